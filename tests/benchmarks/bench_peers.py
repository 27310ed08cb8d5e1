"""Honest peers: polkit's default fit against a vectorised emcee script and a least-squares fit.

    python tests/benchmarks/bench_peers.py [--quick]

All three answer the same question on the same invented emission map
(:func:`bench_hot_path.simulated_map`, two oscillators, Gaussian CCD noise): the seven
parameters of polkit's default whole-map model (exciton and cavity energies, n_eff, Rabi
splitting, two linewidths, noise scale) with their uncertainties.

* polkit: the stages of :func:`polkit.jobs.dispersion.run.fit_dispersion` in its order
  (load, peak table and automatic guess, peak-table mode, whole-map mode, noise
  calibration, refined mode, pre-burn and emcee to the convergence gate), no files written.
  Its time to answer is the whole of that; its ESS per second counts the sampling alone.
* the emcee script: what a skilled user writes in an afternoon with general-purpose tools.
  The whole-map likelihood is written here in numpy, independently of polkit's models
  (cavity dispersion, the 2 x 2 non-Hermitian Hamiltonian diagonalised with
  ``numpy.linalg.eigvals`` for every walker and angle at once, photon residues, branch
  lines, and per angle the two branch amplitudes plus a constant background solved by
  weighted linear least squares), with the same priors (uniform, log-uniform on the same
  bounds) and the same inverse variance per pixel (polkit's calibrated noise model, an
  input of the question).  The amplitudes are not constrained to be >= 0 (polkit's are);
  at this map's occupations they are far from zero, so the two likelihoods coincide where
  the posterior lives (checked at a test point: :func:`same_likelihood`).  It starts from
  a small ball around its own least-squares optimum (below) and runs emcee, vectorised,
  with differential-evolution moves ``[(DEMove, 0.8), (DESnookerMove, 0.2)]``, checking
  every ``check_every`` steps on the second half of the chain until the ArviZ bulk and tail
  ESS (walkers as chains) are >= 1000 and the rank-normalised split R-hat over groups of
  walkers (4 groups, each group's walkers taken together as one chain) is <= 1.01.  Its
  time to answer is the least-squares fit plus that run, checks included.
* least squares: :func:`scipy.optimize.least_squares` on the weighted residual of the same
  numpy model (amplitudes solved inside, so the six physics parameters are fitted with the
  linear ones profiled out), from polkit's automatic guess, errors from
  ``(J^T J)^-1`` times the reduced chi-square (the usual covariance of a least-squares
  fit).  Its time to answer is the call.

Each comparison is repeated with different seeds on the same map (three repeats; one with
``--quick``), since both stopping rules end after a random number of steps; the ratios are
the medians over the repeats.  Figures: ``ess_per_second_ratio_vs_emcee`` (minimum bulk ESS
per second of sampling, convergence checks included, polkit over the script; both ESS by the
script's rule, on the second half of each chain), ``time_to_answer_ratio_vs_emcee``
(polkit's time to answer over the script's: below 1 means polkit answers first),
``time_to_answer_ratio_vs_least_squares`` (the same against least squares), and the
agreement of the answers (medians in posterior standard deviations, error ratios).  The
map and everything in it is invented.  The script prints numbers and never asserts on them.
"""

from __future__ import annotations

import argparse
import json
import time
import warnings

import numpy as np
from bench_hot_path import SEED, simulated_map

#: the order of the physics parameters in the script (polkit's names)
PHYSICS = ("exciton_energy", "cavity_energy", "n_eff", "rabi_splitting", "cavity_linewidth",
           "exciton_linewidth")
MEV = 1e-3


# --------------------------------------------------------------------------------------
# the user's model, written with numpy alone
# --------------------------------------------------------------------------------------
class ScriptModel:
    """The whole-map model and likelihood as a user writes them in numpy.

    Parameters
    ----------
    angle_deg, energy, y, inv_var
        The map (degree, eV, counts) and the inverse variance per pixel (1/counts^2).
    names
        Column names of ``theta`` (the six physics parameters and ``noise_scale``).
    kinds, bounds
        Prior kind (``"uniform"`` or ``"loguniform"``) and support of each column.
    """

    def __init__(self, angle_deg, energy, y, inv_var, names, kinds, bounds,
                 background: str = "constant"):
        self.angle = np.asarray(angle_deg, dtype=float)
        self.energy = np.asarray(energy, dtype=float)
        self.sw = np.sqrt(np.asarray(inv_var, dtype=float))
        # masked pixels (NaN) carry zero weight
        self.rhs = np.nan_to_num(np.asarray(y, dtype=float)) * self.sw
        # background per angle: a constant, or a constant and a slope over the window
        mid = 0.5 * (self.energy[0] + self.energy[-1])
        half = 0.5 * (self.energy[-1] - self.energy[0]) or 1.0
        self.bg = [np.ones_like(self.energy)] + (
            [(self.energy - mid) / half] if background == "linear" else [])
        self.col = {n: i for i, n in enumerate(names)}
        self.log_cols = np.array([k == "loguniform" for k in kinds])
        self.bounds = np.asarray(bounds, dtype=float)
        n_pixels = int(np.count_nonzero(self.sw > 0))
        active = int(np.count_nonzero((self.sw > 0).any(axis=1)))
        # two amplitudes and the background columns per angle
        self.n_dof = n_pixels - (2 + len(self.bg)) * active
        self.sin2 = np.sin(np.deg2rad(self.angle)) ** 2

    def weighted_residual(self, phys: np.ndarray) -> np.ndarray:
        """``sqrt(w) (y - model)`` with the best amplitudes per angle; ``phys`` is ``(W, 6)``.

        Returns shape ``(W, A, E)``.
        """
        ex, ec0, n, rabi, gc, gx = (phys[:, i, None] for i in range(6))
        g = 0.5 * MEV * rabi
        gc, gx = MEV * gc, MEV * gx
        ec = ec0 / np.sqrt(1.0 - self.sin2 / (n * n))  # (W, A)
        w, a = ec.shape
        ham = np.empty((w, a, 2, 2), dtype=complex)
        ham[..., 0, 0] = ec - 0.5j * gc
        ham[..., 0, 1] = ham[..., 1, 0] = g
        ham[..., 1, 1] = np.broadcast_to(ex - 0.5j * gx, (w, a))
        eps = np.linalg.eigvals(ham)
        eps = np.take_along_axis(eps, np.argsort(eps.real, axis=-1), axis=-1)
        r_lo = (eps[..., 0] - (ex - 0.5j * gx)) / (eps[..., 0] - eps[..., 1])
        res = np.stack([r_lo, 1.0 - r_lo], axis=-1)  # (W, A, 2)
        # branch lines -Im(r / (E - eps)) / pi in real arithmetic: with u = E - Re eps and
        # h = -Im eps, (Re r h - Im r u) / (pi (u^2 + h^2))
        design = np.empty((w, a, 2 + len(self.bg), self.energy.size))
        u = self.energy - eps.real[..., None]
        h = -eps.imag[..., None]
        lines = design[:, :, :2]
        np.multiply(res.real[..., None], h, out=lines)
        lines -= res.imag[..., None] * u
        u *= u
        u += h * h
        u *= np.pi
        lines /= u
        for j, col in enumerate(self.bg):
            design[:, :, 2 + j] = col
        design *= self.sw[None, :, None, :]
        gram = np.einsum("wake,wale->wakl", design, design)
        cross = np.einsum("wake,ae->wak", design, self.rhs)
        coef = np.linalg.solve(gram, cross[..., None])[..., 0]
        return self.rhs - np.einsum("wak,wake->wae", coef, design)

    def log_likelihood(self, theta: np.ndarray) -> np.ndarray:
        """``-chi2 / (2 s^2) - (N - K) log s`` per walker (the linear parameters profiled)."""
        theta = np.atleast_2d(theta)
        phys = theta[:, [self.col[n] for n in PHYSICS]]
        s = theta[:, self.col["noise_scale"]]
        chi2 = np.square(self.weighted_residual(phys)).sum(axis=(1, 2))
        return -0.5 * chi2 / (s * s) - self.n_dof * np.log(s)

    def log_prob(self, theta: np.ndarray) -> np.ndarray:
        """Log posterior for emcee (vectorised): uniform and log-uniform priors."""
        theta = np.atleast_2d(theta)
        inside = np.all((theta > self.bounds[:, 0]) & (theta < self.bounds[:, 1]), axis=1)
        out = np.full(theta.shape[0], -np.inf)
        if inside.any():
            t = theta[inside]
            prior = -np.sum(np.log(t[:, self.log_cols]), axis=1)
            out[inside] = self.log_likelihood(t) + prior
        return out


# --------------------------------------------------------------------------------------
# the peers
# --------------------------------------------------------------------------------------
def least_squares_fit(model: ScriptModel, x0_phys: np.ndarray) -> dict:
    """scipy.optimize.least_squares on the six physics parameters, covariance errors."""
    from scipy.optimize import least_squares

    lo = model.bounds[[model.col[n] for n in PHYSICS], 0]
    hi = model.bounds[[model.col[n] for n in PHYSICS], 1]
    x0 = np.clip(x0_phys, lo + 1e-9 * (hi - lo), hi - 1e-9 * (hi - lo))

    def fun(x):
        return model.weighted_residual(x[None])[0].ravel()

    t0 = time.perf_counter()
    fit = least_squares(fun, x0, bounds=(lo, hi), x_scale="jac", method="trf")
    jac = fit.jac
    chi2 = float(np.sum(fit.fun**2))
    n_fit = model.n_dof - len(PHYSICS)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", RuntimeWarning)
        cov = np.linalg.inv(jac.T @ jac) * chi2 / n_fit
    wall = time.perf_counter() - t0
    return {"x": fit.x, "sd": np.sqrt(np.diag(cov)), "wall_s": wall, "nfev": int(fit.nfev),
            "reduced_chi2": chi2 / n_fit, "status": int(fit.status)}


def _diagnostics(kept: np.ndarray, names: list[str], groups: int) -> dict:
    """Bulk/tail ESS (walkers as chains) and R-hat over groups of walkers, ArviZ."""
    import xarray as xr

    from polkit._arviz import arviz

    az = arviz()
    n, w, p = kept.shape
    ds = xr.Dataset({m: (("chain", "draw"), kept[:, :, j].T) for j, m in enumerate(names)})
    per = w // groups
    grouped = kept[:, : per * groups].reshape(n, groups, per, p).transpose(1, 0, 2, 3)
    grouped = grouped.reshape(groups, n * per, p)  # each group's walkers, step by step
    dg = xr.Dataset({m: (("chain", "draw"), grouped[:, :, j]) for j, m in enumerate(names)})
    with warnings.catch_warnings(), np.errstate(invalid="ignore", divide="ignore"):
        warnings.simplefilter("ignore", RuntimeWarning)
        bulk = az.ess(ds, method="bulk")
        tail = az.ess(ds, method="tail")
        rhat = az.rhat(dg, method="rank")
    return {
        "min_ess_bulk": float(min(float(bulk[m]) for m in names)),
        "min_ess_tail": float(min(float(tail[m]) for m in names)),
        "max_rhat_groups": float(max(float(rhat[m]) for m in names)),
    }


def emcee_script(model: ScriptModel, names: list[str], start_point: np.ndarray,
                 start_scale: np.ndarray, *, n_walkers: int = 32, seed: int = 1,
                 check_every: int = 250, max_steps: int = 40000, target_ess: float = 1000.0,
                 rhat_max: float = 1.01, groups: int = 4) -> dict:
    """The user's emcee run: DE moves, vectorised, until ESS and R-hat reach the targets."""
    import emcee

    rng = np.random.default_rng(seed)
    p0 = start_point + start_scale * rng.standard_normal((n_walkers, start_point.size))
    p0 = np.clip(p0, model.bounds[:, 0] + 1e-12, model.bounds[:, 1] - 1e-12)
    sampler = emcee.EnsembleSampler(
        n_walkers, start_point.size, model.log_prob, vectorize=True,
        moves=[(emcee.moves.DEMove(), 0.8), (emcee.moves.DESnookerMove(), 0.2)])
    sampler.random_state = np.random.RandomState(seed).get_state()
    state, steps, diag, checks = p0, 0, {}, 0
    t_sampling = t_checks = 0.0
    t0 = time.perf_counter()
    while steps < max_steps:
        t1 = time.perf_counter()
        state = sampler.run_mcmc(state, check_every, progress=False)
        steps += check_every
        t2 = time.perf_counter()
        chain = sampler.get_chain()
        diag = _diagnostics(chain[steps // 2:], names, groups)
        t3 = time.perf_counter()
        t_sampling += t2 - t1
        t_checks += t3 - t2
        checks += 1
        if (diag["min_ess_bulk"] >= target_ess and diag["min_ess_tail"] >= target_ess
                and diag["max_rhat_groups"] <= rhat_max):
            break
    wall = time.perf_counter() - t0
    kept = sampler.get_chain()[steps // 2:].reshape(-1, start_point.size)
    return dict(diag, steps=steps, wall_s=wall, sampling_s=t_sampling, checks_s=t_checks,
                n_checks=checks, reached=bool(diag and diag["min_ess_bulk"] >= target_ess
                                              and diag["min_ess_tail"] >= target_ess
                                              and diag["max_rhat_groups"] <= rhat_max),
                acceptance=float(np.mean(sampler.acceptance_fraction)),
                ms_per_step=1e3 * t_sampling / max(steps, 1),
                median=np.median(kept, axis=0), sd=np.std(kept, axis=0, ddof=1))


def polkit_default_fit(da, *, seed: int, max_steps: int | None = None):
    """polkit's default whole-map fit, stage by stage as ``fit_dispersion`` runs them."""
    from polkit.errors import ConvergenceWarning
    from polkit.inference import SamplerSettings
    from polkit.jobs.dispersion.robust import protected_mode
    from polkit.jobs.dispersion.run import DEFAULT_STEPS, prepare_dispersion
    from polkit.jobs.dispersion.search import search_modes
    from polkit.jobs.dispersion.stages import table_mode, whole_map_start
    from polkit.jobs.steps import job_sampler, posterior_theta, sample_problem

    t0 = time.perf_counter()
    problem, begin = prepare_dispersion(da)
    table_map = table_mode(problem, begin.x0)
    search = search_modes(problem, [("usual start",
                                     whole_map_start(problem, begin.x0, table_map.x))])
    start, _ = protected_mode(problem, search.best, begin.source.data, begin.x0, table_map.x)
    t1 = time.perf_counter()
    with warnings.catch_warnings():  # an unconverged run is reported, not raised
        warnings.simplefilter("ignore", ConvergenceWarning)
        sampler = job_sampler(DEFAULT_STEPS, SamplerSettings(max_steps=max_steps,
                                                             progress=False))
        output = sample_problem(problem, start, sampler=sampler, seed=seed, pre_burn=True)
    t2 = time.perf_counter()
    draws = posterior_theta(output, problem.space)
    draws = draws.reshape(-1, draws.shape[-1])
    d = output.diagnostics
    chain = np.asarray(output.chains[0])  # (steps, walkers, P), the pre-burn not included
    same_rule = _diagnostics(chain[chain.shape[0] // 2:], problem.space.names, 4)
    return problem, begin, {
        "ess_second_half": same_rule,
        "wall_s": t2 - t0, "preparation_s": t1 - t0, "sampling_s": t2 - t1,
        "converged": bool(d.get("converged")), "steps": int(d.get("steps", 0)),
        "min_ess_bulk": float(d.get("min_ess_bulk", np.nan)),
        "min_ess_tail": float(d.get("min_ess_tail", np.nan)),
        "max_rhat_walkers": float(d.get("max_rhat", np.nan)),
        "median": np.median(draws, axis=0), "sd": np.std(draws, axis=0, ddof=1),
    }


def script_model_for(problem) -> ScriptModel:
    """The user's model on polkit's problem data (the map and its calibrated noise)."""
    space = problem.space
    kinds = [p.prior.kind for p in space]
    return ScriptModel(problem.in_plane, problem.energy, problem.y, problem.inv_var,
                       space.names, kinds, space.bounds,
                       background=getattr(problem, "background", "constant"))


def same_likelihood(problem, model: ScriptModel, x: np.ndarray) -> float:
    """Largest relative difference of the two log-likelihoods at ``x`` and a few points near it."""
    rng = np.random.default_rng(5)
    theta = x + 1e-4 * np.abs(x) * rng.standard_normal((4, x.size))
    theta[0] = x
    a = problem.log_likelihood(theta)
    b = model.log_likelihood(theta)
    return float(np.max(np.abs(a - b) / np.abs(a)))


def _one_repeat(da, seed: int, target_ess: float, max_steps: int | None,
                check_every: int) -> dict:
    """polkit, least squares and the emcee script once, with one seed."""
    problem, begin, pk = polkit_default_fit(da, seed=seed, max_steps=max_steps)
    names = problem.space.names
    model = script_model_for(problem)
    rel = same_likelihood(problem, model, pk["median"])

    phys_idx = [names.index(n) for n in PHYSICS]
    ls = least_squares_fit(model, begin.x0[phys_idx])
    # the script's start: its least-squares optimum, noise scale 1, a ball of 1/10 its errors
    start = np.ones(len(names))
    scale = np.full(len(names), 1e-3)
    start[phys_idx] = ls["x"]
    scale[phys_idx] = 0.1 * np.where(np.isfinite(ls["sd"]), ls["sd"], 1e-3 * np.abs(ls["x"]))
    em = emcee_script(model, names, start, scale, seed=seed, target_ess=target_ess,
                      max_steps=max_steps or 40000, check_every=check_every)
    em_time = ls["wall_s"] + em["wall_s"]

    sd_pk = pk["sd"]
    z_em = {n: float(abs(em["median"][i] - pk["median"][i]) / sd_pk[i]) for i, n in
            enumerate(names)}
    z_ls = {n: float(abs(ls["x"][j] - pk["median"][i]) / sd_pk[i]) for j, (i, n) in
            enumerate(zip(phys_idx, PHYSICS, strict=True))}
    sd_ratio_ls = {n: float(ls["sd"][j] / sd_pk[i]) for j, (i, n) in
                   enumerate(zip(phys_idx, PHYSICS, strict=True))}
    # ESS per second: both sides' ESS by the same rule (second half of the chain, walkers
    # as chains), over their sampling time with their own convergence checks
    pk_ess_rate = pk["ess_second_half"]["min_ess_bulk"] / pk["sampling_s"]
    em_ess_rate = em["min_ess_bulk"] / em["wall_s"]

    def plain(d):
        return {k: (v.tolist() if isinstance(v, np.ndarray) else v) for k, v in d.items()}

    return {
        "seed": seed,
        "parameters": names,
        "same_likelihood_max_rel_diff": rel,
        "polkit": plain(pk),
        "emcee_script": plain(em),
        "least_squares": plain(ls),
        "emcee_script_time_to_answer_s": em_time,
        "ess_per_second_ratio_vs_emcee": pk_ess_rate / em_ess_rate,
        "time_to_answer_ratio_vs_emcee": pk["wall_s"] / em_time,
        "time_to_answer_ratio_vs_least_squares": pk["wall_s"] / ls["wall_s"],
        "emcee_median_difference_in_sd": z_em,
        "least_squares_difference_in_sd": z_ls,
        "least_squares_sd_over_posterior_sd": sd_ratio_ls,
    }


#: the figures that are medians over the repeats
_RATIOS = ("ess_per_second_ratio_vs_emcee", "time_to_answer_ratio_vs_emcee",
           "time_to_answer_ratio_vs_least_squares")


def run(quick: bool = False, *, n_angles: int | None = None, n_energies: int | None = None,
        target_ess: float = 1000.0, max_steps: int | None = None,
        check_every: int = 250, repeats: int | None = None) -> dict:
    """Fit the same map with polkit, the emcee script and least squares; returns the figures.

    Parameters
    ----------
    quick
        A 24 x 240 map and one repeat instead of 40 x 300 and three.
    n_angles, n_energies
        Map size (override ``quick``).
    target_ess, max_steps, check_every
        The script's stopping rule (ESS >= target, R-hat <= 1.01), its step limit (also
        polkit's, when given) and the spacing of its checks.
    repeats
        Repeats with different seeds on the same map (the times to answer vary with the
        seed: polkit's gate and the script's rule stop after a random number of steps);
        the ratios reported are the medians over the repeats, each repeat's beside them.
    """
    import emcee  # noqa: F401  (imported before timing, as the user's script would)

    from polkit._arviz import arviz

    arviz()  # imported before timing: both sides use it
    n_a = n_angles or (24 if quick else 40)
    n_e = n_energies or (240 if quick else 300)
    n_rep = repeats or (1 if quick else 3)
    rng = np.random.default_rng(SEED + 7)
    da, _, _ = simulated_map(n_a, n_e, seed=rng.integers(2**32))
    runs = [_one_repeat(da, int(rng.integers(2**31)), target_ess, max_steps, check_every)
            for _ in range(n_rep)]
    out = dict(runs[0])  # the first repeat in full; the ratios are medians over all
    for key in _RATIOS:
        out[key] = float(np.median([r[key] for r in runs]))
    out.update(
        map={"angles": n_a, "energies": n_e, "pixels": n_a * n_e},
        target_ess=target_ess,
        repeats=[{"seed": r["seed"], "polkit_s": r["polkit"]["wall_s"],
                  "polkit_steps": r["polkit"]["steps"],
                  "emcee_script_s": r["emcee_script_time_to_answer_s"],
                  "emcee_script_steps": r["emcee_script"]["steps"],
                  "least_squares_s": r["least_squares"]["wall_s"],
                  **{k: r[k] for k in _RATIOS}} for r in runs],
        same_likelihood_max_rel_diff=max(r["same_likelihood_max_rel_diff"] for r in runs),
    )
    return out


def print_report(r: dict) -> None:
    """Readable summary of :func:`run`'s figures."""
    m, pk, em, ls = r["map"], r["polkit"], r["emcee_script"], r["least_squares"]
    if len(r["repeats"]) > 1:
        print(f"honest peers: {len(r['repeats'])} repeats (seeds) on the same map; ratios "
              f"below are medians, the details are the first repeat's")
        for q in r["repeats"]:
            print(f"  seed {q['seed']}: polkit {q['polkit_s']:.1f} s ({q['polkit_steps']} "
                  f"steps), script {q['emcee_script_s']:.1f} s ({q['emcee_script_steps']} "
                  f"steps), least squares {q['least_squares_s']:.2f} s; ESS/s ratio "
                  f"{q['ess_per_second_ratio_vs_emcee']:.2f}, time-to-answer ratios "
                  f"{q['time_to_answer_ratio_vs_emcee']:.2f} and "
                  f"{q['time_to_answer_ratio_vs_least_squares']:.1f}")
    print(f"honest peers: {m['angles']} x {m['energies']} invented map, "
          f"{len(r['parameters'])} parameters; same likelihood (polkit vs the script) to "
          f"{r['same_likelihood_max_rel_diff']:.1e} relative")
    print(f"  polkit default fit: {pk['wall_s']:.1f} s to answer ({pk['preparation_s']:.1f} s "
          f"start and noise, {pk['sampling_s']:.1f} s sampling, {pk['steps']} steps, gate "
          f"{'passed' if pk['converged'] else 'NOT passed'}); its own min ESS bulk "
          f"{pk['min_ess_bulk']:.0f}, tail {pk['min_ess_tail']:.0f}; by the script's rule "
          f"(second half) bulk {pk['ess_second_half']['min_ess_bulk']:.0f}, tail "
          f"{pk['ess_second_half']['min_ess_tail']:.0f}, R-hat over groups "
          f"{pk['ess_second_half']['max_rhat_groups']:.4f}")
    print(f"  emcee script (DE moves, vectorised): {r['emcee_script_time_to_answer_s']:.1f} s "
          f"to answer ({ls['wall_s']:.1f} s least squares + {em['sampling_s']:.1f} s sampling "
          f"+ {em['checks_s']:.1f} s checks, {em['steps']} steps, {em['ms_per_step']:.2f} "
          f"ms/step); ESS bulk {em['min_ess_bulk']:.0f}, tail {em['min_ess_tail']:.0f}, "
          f"R-hat over groups {em['max_rhat_groups']:.4f}; target "
          f"{'reached' if em['reached'] else 'NOT reached'}")
    print(f"  least squares: {ls['wall_s']:.2f} s, {ls['nfev']} residual calls, reduced "
          f"chi2 {ls['reduced_chi2']:.3f}")
    print(f"  ess_per_second_ratio_vs_emcee {r['ess_per_second_ratio_vs_emcee']:.2f}; "
          f"time_to_answer_ratio_vs_emcee {r['time_to_answer_ratio_vs_emcee']:.2f}; "
          f"time_to_answer_ratio_vs_least_squares "
          f"{r['time_to_answer_ratio_vs_least_squares']:.1f} (below 1: polkit first)")
    print(f"  script medians vs polkit's: largest difference "
          f"{max(r['emcee_median_difference_in_sd'].values()):.2f} sd; least squares: "
          f"largest difference {max(r['least_squares_difference_in_sd'].values()):.2f} sd, "
          f"error / posterior sd " + ", ".join(
              f"{k} {v:.2f}" for k, v in r["least_squares_sd_over_posterior_sd"].items()))


if __name__ == "__main__":
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--quick", action="store_true", help="a 24 x 240 map, one repeat")
    result = run(parser.parse_args().quick)
    print_report(result)
    print(json.dumps(result, indent=2, default=float))
