"""Simulation-based calibration (SBC) of polkit's posteriors: shared helpers and model cases.

Method (Talts, Betancourt, Simpson, Vehtari and Gelman, "Validating Bayesian inference
algorithms with simulation-based calibration", arXiv:1804.06788, 2018): draw a parameter
vector from the prior, simulate data from the model with it, fit the data, and record the
rank of each true value among ``L`` nearly independent posterior draws.  When the
likelihood, the prior and the sampler are all right, each rank is uniform on
``{0, ..., L}``; a hump in the middle means intervals that are too wide, a U shape
intervals that are too narrow, a slope a bias.

Three cases, each with narrow, proper priors defined here so that every simulated data set
stays sensible (all numbers invented):

* :class:`PeakTableCase` -- a peak table simulated straight from the branch model
  (line maxima and widths of the two polariton lines) with Gaussian errors, fitted with
  :meth:`polkit.jobs.dispersion.problem.DispersionProblem.table_log_likelihood`;
* :class:`WholeMapCase` -- a small emission map simulated with
  :func:`polkit.models.simulate.simulate_map` plus Gaussian noise, fitted with
  :meth:`~polkit.jobs.dispersion.problem.DispersionProblem.log_likelihood`;
* :class:`CoherentCase` -- an up-and-down power sweep of a coherently driven mode simulated
  with :func:`polkit.models.coherent.steady_state_sweep` plus Gaussian errors, fitted with
  :meth:`polkit.jobs.power.problem.PowerProblem.log_likelihood` (the power workflow's own
  likelihood and automatic start).

Every fit runs the project's own path: an automatic start that does not know the truth,
:func:`polkit.inference.find_map`, then :func:`polkit.inference.run_ensemble`.  The run
as a script prints the SBC table of one case::

    python tests/sbc_tools.py peak_table 100 [workers]
"""

from __future__ import annotations

import math
import sys
import warnings
from collections.abc import Callable
from dataclasses import dataclass, field

import numpy as np
import xarray as xr
from scipy import stats

import polkit.inference as polkit_inference
from polkit.data import make_series
from polkit.errors import ConvergenceWarning
from polkit.inference import (
    LogPosterior,
    Parameter,
    ParameterSpace,
    Prior,
    SamplerOutput,
    find_map,
    run_ensemble,
)
from polkit.jobs.dispersion.problem import DispersionProblem, fitted_line_centre
from polkit.jobs.power.problem import PowerProblem
from polkit.models import simulate, spectral
from polkit.models.coherent import steady_state_sweep

MEV = 1e-3


# ----------------------------------------------------------------------------------------
# ranks and their checks
# ----------------------------------------------------------------------------------------
def thinned_draws(output: SamplerOutput, n_draws: int, rng: np.random.Generator
                  ) -> tuple[np.ndarray, int]:
    """``n_draws`` nearly independent posterior draws of a run, and how many were available.

    After the run's burn-in, every walker is read at steps one autocorrelation time apart
    (the largest over parameters and ensembles, rounded up); ``n_draws`` of these are
    chosen at random without replacement.  # Source: Talts et al. (2018), section 5.1
    (thin the chain so that the draws are nearly independent)
    """
    chains = output.chains  # (E, S, W, P)
    tau = float(np.max(output.autocorr_time))
    step = max(1, int(math.ceil(tau))) if math.isfinite(tau) else 1
    kept = chains[:, output.burn_in :: step]
    pool = kept.reshape(-1, chains.shape[-1])
    if pool.shape[0] < n_draws:
        raise RuntimeError(
            f"only {pool.shape[0]} nearly independent draws after burn-in (tau {tau:.1f}, "
            f"{chains.shape[1]} steps); SBC needs {n_draws}: run longer chains"
        )
    pick = rng.choice(pool.shape[0], size=n_draws, replace=False)
    return pool[pick], int(pool.shape[0])


def rank_of_truth(truth: np.ndarray, draws: np.ndarray, rng: np.random.Generator) -> np.ndarray:
    """Number of draws below the truth, per parameter (ties broken at random), shape ``(P,)``."""
    truth = np.asarray(truth, dtype=float).reshape(1, -1)
    below = np.sum(draws < truth, axis=0)
    ties = np.sum(draws == truth, axis=0)
    return below + rng.integers(0, ties + 1)


def chi2_uniformity(ranks: np.ndarray, n_draws: int, n_bins: int) -> float:
    """p-value of Pearson's chi-square test that ``ranks`` are uniform on ``{0..n_draws}``.

    ``n_draws + 1`` must be a multiple of ``n_bins`` so every bin holds the same number of
    rank values.  # Source: Talts et al. (2018), section 4 (histogram of ranks in bins of
    equal size); Pearson's test via scipy.stats.chisquare
    """
    if (n_draws + 1) % n_bins:
        raise ValueError(f"{n_draws + 1} rank values do not split into {n_bins} equal bins")
    counts = np.bincount(np.asarray(ranks) * n_bins // (n_draws + 1), minlength=n_bins)
    return float(stats.chisquare(counts).pvalue)


def central_coverage(ranks: np.ndarray, n_draws: int, level: float) -> tuple[float, float]:
    """Observed and expected coverage of the central ``level`` interval of the draws.

    The truth lies inside the central interval made of the draws ``k .. L - k`` (in order)
    when its rank is between ``k`` and ``L - k``, ``k = floor((L + 1)(1 - level) / 2)``;
    for a calibrated posterior the rank is uniform, so the expected coverage is exactly
    ``(L + 1 - 2 k) / (L + 1)``.  # Source: Talts et al. (2018); the discrete uniform law
    """
    k = int(math.floor((n_draws + 1) * (1.0 - level) / 2.0 + 1e-9))  # no float round-down
    ranks = np.asarray(ranks)
    inside = (ranks >= k) & (ranks <= n_draws - k)
    return float(np.mean(inside)), (n_draws + 1 - 2 * k) / (n_draws + 1)


def binomial_bounds(n: int, p: float, alpha: float) -> tuple[int, int]:
    """Central ``1 - alpha`` acceptance region of a Binomial(n, p) count.

    # Source: the binomial law of the number of covered truths among independent
    # simulations (scipy.stats.binom quantiles)
    """
    return int(stats.binom.ppf(alpha / 2.0, n, p)), int(stats.binom.isf(alpha / 2.0, n, p))


@dataclass
class SBCRun:
    """Ranks of one SBC campaign and what went with them.

    Attributes
    ----------
    case
        Name of the model case.
    names
        Parameter names.
    ranks
        Shape ``(n_sims, P)``, values in ``0..n_draws``.
    n_draws
        Posterior draws per simulation ``L``.
    not_converged
        Indices of simulations whose sampler did not pass its gate.
    steps
        Chain length of each simulation.
    """

    case: str
    names: list[str]
    ranks: np.ndarray
    n_draws: int
    not_converged: list[int] = field(default_factory=list)
    steps: list[int] = field(default_factory=list)

    @property
    def n_sims(self) -> int:
        return int(self.ranks.shape[0])

    def statistics(self, n_bins: int) -> dict[str, dict[str, float]]:
        """Per parameter: chi-square p-value and observed/expected 68 % and 95 % coverage."""
        out = {}
        for j, name in enumerate(self.names):
            r = self.ranks[:, j]
            c68, e68 = central_coverage(r, self.n_draws, 0.68)
            c95, e95 = central_coverage(r, self.n_draws, 0.95)
            out[name] = {"chi2_p": chi2_uniformity(r, self.n_draws, n_bins), "cov68": c68,
                         "exp68": e68, "cov95": c95, "exp95": e95}
        return out

    def failures(self, n_bins: int, alpha: float) -> list[str]:
        """Checks that fail at family-wise level ``alpha`` (Bonferroni over all checks).

        Three checks per parameter (uniform ranks, 68 % and 95 % coverage), each at
        ``alpha / (3 P)``.  # Source: Bonferroni inequality; Talts et al. (2018)
        """
        stats_ = self.statistics(n_bins)
        each = alpha / (3 * len(self.names))
        bad = []
        for name, s in stats_.items():
            if not s["chi2_p"] > each:
                bad.append(f"{name}: ranks not uniform, chi-square p = {s['chi2_p']:.2g} "
                           f"(limit {each:.2g}); histogram {self.histogram(name, n_bins)}")
            for lv in ("68", "95"):
                lo, hi = binomial_bounds(self.n_sims, s[f"exp{lv}"], each)
                got = round(s[f"cov{lv}"] * self.n_sims)
                if not lo <= got <= hi:
                    bad.append(f"{name}: {lv} % interval covered the truth {got}/{self.n_sims} "
                               f"times, expected {lo}..{hi}")
        return bad

    def histogram(self, name: str, n_bins: int) -> list[int]:
        r = self.ranks[:, self.names.index(name)]
        return np.bincount(r * n_bins // (self.n_draws + 1), minlength=n_bins).tolist()

    def table(self, n_bins: int) -> str:
        """A plain-text table of the statistics (for the README and the test log)."""
        lines = [f"SBC {self.case}: {self.n_sims} simulations, {self.n_draws} draws each, "
                 f"{n_bins} bins; not converged: {len(self.not_converged)}; steps "
                 f"{min(self.steps)}-{max(self.steps)}",
                 f"{'parameter':<26} {'chi2 p':>7} {'68 %':>6} {'95 %':>6}  rank histogram"]
        for name, s in self.statistics(n_bins).items():
            lines.append(f"{name:<26} {s['chi2_p']:7.3f} {s['cov68']:6.3f} {s['cov95']:6.3f}  "
                         f"{self.histogram(name, n_bins)}")
        e = self.statistics(n_bins)[self.names[0]]
        lines.append(f"(expected coverage {e['exp68']:.3f} and {e['exp95']:.3f})")
        return "\n".join(lines)


@dataclass(frozen=True)
class SamplerSettings:
    """How long each SBC fit runs.

    The full campaign uses the project's convergence gate (bulk and tail ESS of 1000 for
    every parameter, 400 for the noise scale, R-hat over groups of walkers <= 1.01, and a
    chain of at least 25 autocorrelation times, checked every 100 steps).  The reduced
    campaign asks for an ESS of 100 and 12 autocorrelation times: enough for the 99 nearly
    independent draws the ranks use, and a fraction of the cost.
    """

    n_walkers: int = 32
    autocorr_factor: float = 25.0
    tau_rtol: float | None = None
    ess_target: float = 1000.0
    min_steps: int = 400
    max_steps: int = 8000
    check_every: int = 100


#: root seed of the SBC campaigns in the tests and in the README numbers
SEED = 2018
REDUCED = SamplerSettings(autocorr_factor=12.0, ess_target=100.0, min_steps=150,
                          max_steps=1500, check_every=50)
FULL = SamplerSettings()


def sample(loglike: Callable, space: ParameterSpace, x0: np.ndarray, seed,
           settings: SamplerSettings) -> tuple[SamplerOutput, bool]:
    """The project's fitting path: MAP from ``x0``, then the ensemble sampler.

    Returns the sampler output and whether its gate passed (a failed gate is recorded,
    not raised: SBC then shows what the draws are worth).
    """
    start = find_map(LogPosterior(loglike, space), space, x0)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        gate = polkit_inference.GateSettings(autocorr_factor=settings.autocorr_factor,
                                             tau_rtol=settings.tau_rtol,
                                             ess_target=settings.ess_target)
        run = polkit_inference.SamplerSettings(
            n_walkers=settings.n_walkers, progress=False, min_steps=settings.min_steps,
            max_steps=settings.max_steps, check_every=settings.check_every, gate=gate)
        out = run_ensemble(loglike, space, start, run, seed=seed)
    return out, bool(out.converged)


def _one_simulation(case_name: str, child: np.random.SeedSequence, n_draws: int,
                    settings: SamplerSettings) -> tuple[np.ndarray, int, bool]:
    """Truth from the prior, data, fit, ranks: one SBC simulation, seeded by ``child``."""
    case = CASES[case_name]()
    truth_seq, data_seq, fit_seq, pick_seq = child.spawn(4)
    truth = case.space.sample_prior(np.random.default_rng(truth_seq), 1)[0]
    loglike, x0, space = case.problem(truth, np.random.default_rng(data_seq))
    out, ok = sample(loglike, space, x0, fit_seq, settings)
    pick_rng = np.random.default_rng(pick_seq)
    draws, _ = thinned_draws(out, n_draws, pick_rng)
    return rank_of_truth(truth, draws, pick_rng), int(out.chains.shape[1]), ok


def run_sbc(case_name: str, n_sims: int, n_draws: int, seed: int, settings: SamplerSettings,
            *, workers: int = 1) -> SBCRun:
    """Run ``n_sims`` simulations of a case; each gets its own spawned seed sequence.

    The result does not depend on ``workers`` (processes running simulations side by side):
    every simulation draws its truth, data, chains and ranks from its own child sequence.
    """
    children = np.random.SeedSequence(seed).spawn(n_sims)
    args = [(case_name, child, n_draws, settings) for child in children]
    if workers > 1:
        import multiprocessing
        from concurrent.futures import ProcessPoolExecutor

        ctx = multiprocessing.get_context("fork")
        with ProcessPoolExecutor(max_workers=workers, mp_context=ctx) as pool:
            results = list(pool.map(_one_simulation, *zip(*args, strict=True)))
    else:
        results = [_one_simulation(*a) for a in args]
    ranks = np.array([r[0] for r in results], dtype=int)
    steps = [r[1] for r in results]
    not_converged = [i for i, r in enumerate(results) if not r[2]]
    return SBCRun(case_name, CASES[case_name]().space.names, ranks, n_draws, not_converged,
                  steps)


# ----------------------------------------------------------------------------------------
# the cases (invented samples)
# ----------------------------------------------------------------------------------------
def _dispersion_space(gc: tuple[float, float], gx: tuple[float, float]) -> ParameterSpace:
    """Narrow, proper priors around an invented GaAs-like cavity (typical ranges, from memory)."""
    return ParameterSpace([
        Parameter("exciton_energy", "eV", Prior.normal(1.5450, 0.0005)),
        Parameter("cavity_energy", "eV", Prior.normal(1.5420, 0.0010)),
        Parameter("n_eff", "1", Prior.truncnormal(3.4, 0.05, 3.2, 3.6)),
        Parameter("rabi_splitting", "meV", Prior.truncnormal(10.0, 0.5, 8.0, 12.0)),
        Parameter("cavity_linewidth", "meV", Prior.loguniform(*gc)),
        Parameter("exciton_linewidth", "meV", Prior.loguniform(*gx)),
        Parameter("noise_scale", "1", Prior.loguniform(0.8, 1.25)),
    ])


def _prior_centre(space: ParameterSpace) -> np.ndarray:
    """A start that knows nothing of the truth: the prior median of every parameter."""
    out = []
    for p in space:
        pr = p.prior
        if pr.kind in ("normal", "truncnormal"):
            out.append(pr.mu)
        elif pr.kind == "loguniform":
            out.append(math.sqrt(pr.low * pr.high))
        else:
            out.append(0.5 * (pr.low + pr.high))
    return np.array(out)


class PeakTableCase:
    """Peak table simulated from the branch model; fitted with the table likelihood.

    13 angles from -20 to 20 degree, two branches; the upper branch is missing at the two
    outermost angles on each side (as where it fades), so both matching rules of the
    likelihood are used.  Errors (invented): lower branch 0.08 meV in energy and 0.03 meV in
    width, upper branch 0.2 and 0.08 meV, all multiplied by ``noise_scale``.
    """

    name = "peak_table"

    def __init__(self):
        self.space = _dispersion_space((0.2, 0.4), (0.4, 0.8))
        self.angle = np.linspace(-20.0, 20.0, 13)
        self.energy = np.linspace(1.525, 1.560, 8)  # unused by the table likelihood

    def problem(self, truth: np.ndarray, rng: np.random.Generator):
        """``(log-likelihood, start, space)`` for one simulated table."""
        helper = DispersionProblem(axis="angle", in_plane=self.angle, energy=self.energy,
                                   y=np.zeros((self.angle.size, self.energy.size)),
                                   inv_var=np.ones((self.angle.size, self.energy.size)),
                                   space=self.space)
        p = helper.physics(truth[None, :])
        poles, res = spectral.branch_poles(self.angle, axis="angle",
                                           **{k: v for k, v in p.items() if k != "axis"})
        pos = fitted_line_centre(poles, res)[0]  # (A, 2) eV
        wid = (-2.0 * poles.imag)[0] / MEV  # (A, 2) meV
        de = np.broadcast_to(np.array([0.08, 0.2]) * MEV, pos.shape).copy()
        dw = np.broadcast_to(np.array([0.03, 0.08]), pos.shape).copy()
        s = truth[self.space.index("noise_scale")]
        e = pos + s * de * rng.standard_normal(pos.shape)
        w = wid + s * dw * rng.standard_normal(pos.shape)
        faded = np.zeros(pos.shape, dtype=bool)
        faded[[0, 1, -2, -1], 1] = True
        for arr in (e, de, w, dw):
            arr[faded] = np.nan
        dims = ("angle", "peak")
        table = xr.Dataset(
            {"energy": (dims, e, {"units": "eV"}), "energy_error": (dims, de, {"units": "eV"}),
             "fwhm": (dims, w, {"units": "meV"}), "fwhm_error": (dims, dw, {"units": "meV"}),
             "found": (dims, (~faded).astype(int), {"units": "1"})},
            coords={"angle": ("angle", self.angle, {"units": "degree"}), "peak": [0, 1]},
            attrs={"note": "invented peak table simulated from the branch model"})
        problem = DispersionProblem(axis="angle", in_plane=self.angle, energy=self.energy,
                                    y=helper.y, inv_var=helper.inv_var, space=self.space,
                                    table=table)
        return problem.table_log_likelihood, _prior_centre(self.space), self.space


class WholeMapCase:
    """A small emission map (9 angles x 60 energies) fitted with the whole-map likelihood.

    Mean map: :func:`polkit.models.simulate.simulate_map` with branch occupations 1 and 0.3
    (scaled to a lower-branch peak near 400 signal units, invented) and a background of 20;
    noise Gaussian with standard deviation ``noise_scale x 10`` on every pixel.  Amplitudes
    and backgrounds are solved per angle by the likelihood (variable projection), as in the
    whole-map fit.  Linewidths are broader than the pixel spacing (0.54 meV).
    """

    name = "whole_map"
    sigma = 10.0

    def __init__(self):
        self.space = _dispersion_space((0.6, 1.2), (1.0, 2.0))
        self.angle = np.linspace(-15.0, 15.0, 9)
        self.energy = np.linspace(1.528, 1.560, 60)

    def problem(self, truth: np.ndarray, rng: np.random.Generator):
        """``(log-likelihood, start, space)`` for one simulated map."""
        inv_var = np.full((self.angle.size, self.energy.size), 1.0 / self.sigma**2)
        helper = DispersionProblem(axis="angle", in_plane=self.angle, energy=self.energy,
                                   y=np.zeros(inv_var.shape), inv_var=inv_var,
                                   space=self.space)
        p = {k: v[0] if isinstance(v, np.ndarray) else v
             for k, v in helper.physics(truth[None, :]).items()}
        unit = simulate.simulate_map(self.angle, self.energy, kind="emission",
                                     amplitudes=[1.0, 0.3], **p)
        scale = 400.0 / float(np.max(unit.signal))
        mean = simulate.simulate_map(self.angle, self.energy, kind="emission",
                                     amplitudes=[scale, 0.3 * scale], background=20.0,
                                     **p).signal
        s = truth[self.space.index("noise_scale")]
        y = mean + s * self.sigma * rng.standard_normal(mean.shape)
        problem = DispersionProblem(axis="angle", in_plane=self.angle, energy=self.energy,
                                    y=y, inv_var=inv_var, space=self.space)
        return problem.log_likelihood, _prior_centre(self.space), self.space


class CoherentCase:
    """An up-then-down power sweep of a coherently driven mode, fitted with the power job's
    likelihood and automatic start.

    20 powers from 0.5 to 10 mW up, then the same down; intensity ``s u`` with the reduced
    blueshift ``u`` of :func:`polkit.models.coherent.steady_state_sweep` (gamma = 1) and
    quoted errors of 15 counts (invented), times ``intensity_noise_scale``.  The priors keep
    the mode bistable (Delta/gamma from 1.2 to 2.5, above sqrt(3)/2) with both jumps inside
    the power range (Baas et al., Phys. Rev. A 69, 023809, 2004).
    """

    name = "coherent"
    error = 15.0

    def __init__(self):
        up = np.linspace(0.5, 10.0, 20)
        self.power = np.concatenate([up, up[::-1]])
        self.sweep = np.array(["up"] * 20 + ["down"] * 20)
        self.space = ParameterSpace([
            Parameter("detuning_ratio", "1", Prior.uniform(1.2, 2.5)),
            Parameter("reduced_drive_per_power", "1/mW", Prior.loguniform(0.3, 1.0)),
            Parameter("intensity_scale", "counts", Prior.loguniform(300.0, 600.0)),
            Parameter("intensity_noise_scale", "1", Prior.loguniform(0.8, 1.25)),
        ])

    def problem(self, truth: np.ndarray, rng: np.random.Generator):
        """``(log-likelihood, start, space)`` for one simulated sweep."""
        d, phi, s_i, s_n = truth
        u = np.concatenate([
            steady_state_sweep(d, 1.0, phi * self.power[:20], "up"),
            steady_state_sweep(d, 1.0, phi * self.power[20:], "down"),
        ])
        y = s_i * u + s_n * self.error * rng.standard_normal(u.shape)
        series = make_series(self.power, y, units="counts", sweep=self.sweep,
                             intensity_error=np.full(u.shape, self.error),
                             note="invented coherent-drive sweep for calibration tests")
        problem = PowerProblem.from_series(series, "coherent")
        if problem.channels["intensity"].noise_param != "intensity_noise_scale":
            raise RuntimeError("the power job no longer names its noise parameter "
                               "intensity_noise_scale; update the SBC case")
        problem.space = self.space
        guess = problem.guess()  # the power job's automatic start (grid search)
        x0 = np.array([_inside(p, guess[p.name]) for p in self.space])
        space = problem.with_scales(dict(zip(self.space.names, x0, strict=True)))
        return problem.log_likelihood, x0, space


def _inside(param: Parameter, value: float) -> float:
    lo, hi = param.prior.bounds
    eps = 1e-6 * (hi - lo)
    return float(np.clip(value, lo + eps, hi - eps))


CASES = {"peak_table": PeakTableCase, "whole_map": WholeMapCase, "coherent": CoherentCase}


if __name__ == "__main__":  # pragma: no cover - manual runs
    name = sys.argv[1] if len(sys.argv) > 1 else "peak_table"
    n = int(sys.argv[2]) if len(sys.argv) > 2 else 20
    full = n >= 100
    run = run_sbc(name, n, 199 if full else 99, seed=SEED, settings=FULL if full else REDUCED,
                  workers=int(sys.argv[3]) if len(sys.argv) > 3 else 1)
    print(run.table(10 if full else 4))
    print("failures:", run.failures(10 if full else 4, 0.01 if full else 0.001) or "none")
