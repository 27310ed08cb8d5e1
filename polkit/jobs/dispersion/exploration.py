"""Where the mode search of the dispersion job looks for modes, and how it finishes them.

:func:`~polkit.jobs.dispersion.search.search_modes` takes these steps: a scrambled Sobol
design over the prior box of the physics parameters (:func:`sobol_design`), a vectorised
stochastic hill climb of the best distant design points (:func:`hill_climb`), the
branch-consistent grid for a map where one branch is seen (:func:`branch_grid`), and a
local optimisation from the best points (:func:`polish`).
"""

from __future__ import annotations

import math

import numpy as np
from scipy import optimize, stats
from scipy.stats import qmc

from polkit.constants import HBARC_EV_UM
from polkit.inference import MapResult, find_map
from polkit.units import LINEWIDTH_UNITS

__all__ = [
    "HELD",
    "DESIGN_SEED",
    "from_unit_box",
    "sobol_design",
    "hill_climb",
    "branch_grid",
    "prior_support",
    "polish",
]

#: iterations and proposals per candidate of the hill climb
CLIMB_ITERATIONS = 25
CLIMB_PROPOSALS = 16
#: parameters held at the start's value in the design (not physics)
HELD = ("noise_scale",)
#: fixed seed of the design: the search depends on the data only, not on the run's seed
DESIGN_SEED = 20240611


def from_unit_box(prior, u: np.ndarray) -> np.ndarray:
    """Map unit-interval coordinates onto a prior's support (by its quantiles)."""
    eps = 1e-9
    u = np.clip(u, eps, 1.0 - eps)
    if prior.kind == "uniform":
        return prior.low + u * (prior.high - prior.low)
    if prior.kind == "loguniform":
        return np.exp(np.log(prior.low) + u * (np.log(prior.high) - np.log(prior.low)))
    if prior.kind == "normal":
        return prior.mu + prior.sigma * stats.norm.ppf(u)
    a, b = (prior.low - prior.mu) / prior.sigma, (prior.high - prior.mu) / prior.sigma
    return stats.truncnorm.ppf(u, a, b, loc=prior.mu, scale=prior.sigma)


def sobol_design(space, held: np.ndarray, n: int) -> tuple[np.ndarray, np.ndarray]:
    """Sobol points ``(n, P)`` in the parameters' units, and their unit-box coordinates."""
    free = [j for j, name in enumerate(space.names) if name not in HELD]
    sobol = qmc.Sobol(d=len(free), scramble=True, seed=np.random.default_rng(DESIGN_SEED))
    u = sobol.random_base2(int(round(math.log2(n))))
    theta = np.repeat(np.asarray(held, dtype=float)[None, :], u.shape[0], axis=0)
    for k, j in enumerate(free):
        theta[:, j] = from_unit_box(space[space.names[j]].prior, u[:, k])
    return theta, u


def hill_climb(post, space, theta0: np.ndarray, u0: np.ndarray, held: np.ndarray, *,
           iterations: int = CLIMB_ITERATIONS, proposals: int = CLIMB_PROPOSALS,
           rng: np.random.Generator) -> tuple[np.ndarray, np.ndarray, np.ndarray, int]:
    """A vectorised stochastic hill climb of many candidates at once, in unit-box coordinates.

    Each iteration proposes ``proposals`` Gaussian moves per candidate (one call of the
    posterior for all of them), keeps the best move when it improves and widens that
    candidate's step (x1.3), else narrows it (x0.6).  It brings rough design points close
    enough to their local optimum for the gradient optimiser to finish quickly.
    # common practice, no published source
    """
    free = [j for j, name in enumerate(space.names) if name not in HELD]
    k, d = u0.shape
    u = u0.copy()
    theta = theta0.copy()
    value = np.asarray(post(theta), dtype=float)
    step = np.full(k, 0.05)
    calls = 0
    for _ in range(iterations):
        trial = u[:, None, :] + step[:, None, None] * rng.standard_normal((k, proposals, d))
        trial = np.clip(trial, 0.0, 1.0).reshape(-1, d)
        th = np.repeat(np.asarray(held, dtype=float)[None, :], trial.shape[0], axis=0)
        for c, j in enumerate(free):
            th[:, j] = from_unit_box(space[space.names[j]].prior, trial[:, c])
        v = np.asarray(post(th), dtype=float).reshape(k, proposals)
        v = np.where(np.isfinite(v), v, -np.inf)
        calls += trial.shape[0]
        best = np.argmax(v, axis=1)
        gain = v[np.arange(k), best] > value
        pick = np.arange(k) * proposals + best
        u[gain] = trial[pick[gain]]
        theta[gain] = th[pick[gain]]
        value[gain] = v[np.arange(k), best][gain]
        step = np.clip(np.where(gain, step * 1.3, step * 0.6), 1e-4, 0.3)
    return theta, u, value, calls


#: exciton energies x Rabi splittings of the branch-consistent grid
BRANCH_GRID = (48, 32)


def branch_grid(problem, held: np.ndarray, shape: tuple[int, int] = BRANCH_GRID):
    """Points of the prior box that put one branch on the branch the peak table saw.

    A map where only one branch is bright (a dim upper branch at room temperature, a faint
    one at low counts) fixes that branch's energy ``L(theta)`` well but leaves the exciton
    energy and the coupling nearly degenerate, and a random design rarely lands in the
    narrow ridge of parameters that reproduce ``L``.  For every exciton energy ``E_X`` and
    splitting ``2g`` of a grid over their priors, the coupled-oscillator relation
    ``(L - E_C)(L - E_X) = g^2`` (Hopfield, Phys. Rev. 112, 1555 (1958), the 2 x 2
    eigenvalue equation) gives the cavity energy at each angle where the branch was seen,
    ``E_C = L + g^2 / (E_X - L)`` (the seen branch is the lower one where ``E_X > L``, the
    upper one where ``E_X < L``); the planar-cavity dispersion, linear in ``sin^2(theta)``
    for ``1/E_C^2`` (in ``k^2`` for ``E_C^2``), then gives ``E_C0`` and ``n_eff`` by linear
    least squares.  Linewidths come from the table.  The whole-map posterior decides where
    the dim branch is.  Returns ``(theta, unit_coordinates)`` or ``None``.
    # common practice, no published source
    """
    space = problem.space
    names = space.names
    table = getattr(problem, "table", None)
    if table is None or "rabi_splitting" not in names or "energy" not in table:
        return None
    found = np.asarray(table["found"].values, dtype=bool) & np.isfinite(table["energy"].values)
    if found.ndim != 2 or not found.any():
        return None
    col = int(np.argmax(found.sum(axis=0)))
    rows = found[:, col]
    if rows.sum() < 4:
        return None
    lev = np.asarray(table["energy"].values[rows, col], dtype=float)  # eV
    x_in = np.asarray(problem.in_plane, dtype=float)[rows]
    fwhm = np.asarray(table["fwhm"].values[rows, col], dtype=float) if "fwhm" in table else []
    to_mev = LINEWIDTH_UNITS.get(str(table["fwhm"].attrs.get("units", "meV")), 1.0) \
        if "fwhm" in table else 1.0
    width = float(np.nanmedian(fwhm)) * to_mev if np.size(fwhm) else float("nan")  # meV
    ex_prior, g_prior = space["exciton_energy"].prior, space["rabi_splitting"].prior
    ex = np.linspace(*prior_support(ex_prior), shape[0])
    g_lo, g_hi = prior_support(g_prior)
    rabi = np.geomspace(max(g_lo, 0.02 * g_hi, 1e-3), g_hi, shape[1])  # meV
    ex_g, rabi_g = (a.ravel() for a in np.meshgrid(ex, rabi, indexing="ij"))
    g = 0.5e-3 * rabi_g  # eV
    diff = ex_g[:, None] - lev[None, :]
    same_side = np.all(diff > 0, axis=1) | np.all(diff < 0, axis=1)
    e_c = lev[None, :] + g[:, None] ** 2 / np.where(diff == 0, np.nan, diff)
    if problem.axis == "angle":
        reg, y = np.sin(np.radians(x_in)) ** 2, 1.0 / e_c**2
    else:
        reg, y = x_in**2, e_c**2
    design = np.column_stack([np.ones_like(reg), reg])
    coef = np.linalg.lstsq(design, np.nan_to_num(y).T, rcond=None)[0]  # (2, G)
    with np.errstate(invalid="ignore", divide="ignore"):
        if problem.axis == "angle":
            e_c0, n_eff = 1.0 / np.sqrt(coef[0]), np.sqrt(coef[0] / -coef[1])
        else:
            e_c0, n_eff = np.sqrt(coef[0]), HBARC_EV_UM / np.sqrt(coef[1])
    ok = same_side & np.isfinite(e_c0) & np.isfinite(n_eff)
    if not ok.any():
        return None
    theta = np.repeat(np.asarray(held, dtype=float)[None, :], ok.sum(), axis=0)
    values = {"exciton_energy": ex_g[ok], "rabi_splitting": rabi_g[ok],
              "cavity_energy": e_c0[ok], "n_eff": n_eff[ok]}
    if np.isfinite(width) and width > 0:
        values["cavity_linewidth"] = np.full(ok.sum(), width)
        values["exciton_linewidth"] = np.full(ok.sum(), width)
    lo, hi = space.bounds.T
    for name, v in values.items():
        if name in names:
            j = names.index(name)
            theta[:, j] = v
    inside = np.all((theta >= lo) & (theta <= hi), axis=1)
    if not inside.any():
        return None
    theta = theta[inside]
    u = (theta - lo) / np.where(hi > lo, hi - lo, 1.0)
    free = [j for j, name in enumerate(names) if name not in HELD]
    return theta, u[:, free]


def prior_support(prior) -> tuple[float, float]:
    """A finite range of a prior (its bounds, or mu -/+ 3 sigma)."""
    if prior.kind in ("uniform", "loguniform"):
        return float(prior.low), float(prior.high)
    lo = getattr(prior, "low", None)
    hi = getattr(prior, "high", None)
    mu, sd = float(prior.mu), float(prior.sigma)
    lo = mu - 3 * sd if lo is None or not np.isfinite(lo) else max(float(lo), mu - 3 * sd)
    hi = mu + 3 * sd if hi is None or not np.isfinite(hi) else min(float(hi), mu + 3 * sd)
    return lo, hi


def polish(post, space, x0: np.ndarray) -> MapResult:
    """A local optimum from ``x0``: L-BFGS-B with the gradient from one vectorised call.

    Central differences (step 1e-4 of each parameter's typical scale, one-sided at a
    bound) are evaluated for every parameter in a single call of the posterior, which is
    far cheaper than one call per parameter; :func:`~polkit.inference.find_map` then
    finishes from the optimum and gives the local spread.
    # common practice, no published source
    """
    s = space.scales
    lo, hi = space.bounds.T
    p = x0.size
    eye = np.eye(p)

    def fun_grad(z):
        x = np.clip(x0 + s * z, lo, hi)
        up = np.clip(x[None, :] + 1e-4 * s * eye, lo, hi)
        down = np.clip(x[None, :] - 1e-4 * s * eye, lo, hi)
        f = np.asarray(post(np.vstack([x[None, :], up, down])), dtype=float)
        if not np.isfinite(f[0]):
            return 1e300, np.zeros(p)
        fu, fd = f[1:p + 1], f[p + 1:]
        fu = np.where(np.isfinite(fu), fu, f[0])
        fd = np.where(np.isfinite(fd), fd, f[0])
        span = (np.diag(up) - np.diag(down)) / s
        grad = np.where(span > 0, (fu - fd) / np.where(span > 0, span, 1.0), 0.0)
        return -f[0], -grad

    zb = list(zip((lo - x0) / s, (hi - x0) / s, strict=True))
    res = optimize.minimize(fun_grad, np.zeros(p), jac=True, method="L-BFGS-B", bounds=zb,
                            options={"maxiter": 200})
    return find_map(post, space, np.clip(x0 + s * res.x, lo, hi))
