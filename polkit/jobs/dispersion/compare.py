"""Model comparison for the dispersion job: weak coupling, two and three oscillators.

Which picture does a map support: the bare cavity mode crossing an uncoupled exciton line
(weak coupling, ``g = 0``), one exciton coupled to the photon (two oscillators), or two
excitons (three oscillators)?  Each model is fitted to the same map with the same noise
model, and the fits are ranked by their expected log predictive density (elpd) for a new
spectrum, estimated by Pareto-smoothed importance-sampling leave-one-out cross-validation
(PSIS-LOO; Vehtari, Gelman and Gabry, Stat. Comput. 27, 1413, 2017) with ArviZ, and by
WAIC (Watanabe, JMLR 11, 3571, 2010) as a cross-check.

The unit left out is one **spectrum** (one angle or k): the pixels of a spectrum share its
amplitudes and background, so they are not exchangeable one by one.  The pointwise
log-likelihood of spectrum ``a`` for a posterior draw is the Gaussian log density of its
pixels with the amplitudes and background solved for that draw (variable projection),
including the normalisation (the noise scale and the per-pixel variances), so models are
compared on the same data in the same units (nats).

Caveats (also written into every comparison's summary):

* The linear amplitudes and backgrounds are solved per spectrum, not sampled, so they are
  fitted to the very spectrum that LOO leaves out.  Their optimism is removed by the
  Akaike correction of one nat per solved coefficient (Akaike, IEEE Trans. Autom. Control
  19, 716, 1974), counting only the *active* coefficients (non-zero amplitudes, plus the
  background), which are the degrees of freedom of a non-negative least-squares fit
  (Meyer and Woodroofe, Ann. Stat. 28, 1083, 2000).  It is exact for a linear-Gaussian
  model with known noise and an approximation otherwise.
* The criteria compare predictive accuracy, not the truth of a model: a three-oscillator
  model that nests the two-oscillator one can tie with it when the second exciton is not
  needed; a tie favours the simpler model by convention, not by evidence.
* PSIS-LOO is reliable only where the Pareto shape ``k`` stays below 0.7 (Vehtari et al.
  2017); spectra above it are counted and the result says so.  A model whose fit did not
  converge is ranked but marked, and the comparison is then not reported as converged.
* The noise model is calibrated once (on the residuals of the reference model's mode)
  and shared; a poor noise model affects all models alike but can still tilt the ranking.
"""

from __future__ import annotations

import logging
import os
import warnings
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import xarray as xr

from polkit.errors import ConfigError, ConvergenceWarning, DataWarning
from polkit.files import json_safe, write_json, write_netcdf
from polkit.inference import SamplerSettings
from polkit.inference.priors import read_prior_file
from polkit.jobs.dispersion.problem import MODELS, DispersionProblem
from polkit.jobs.dispersion.run import (
    DEFAULT_STEPS,
    DispersionFit,
    build_dispersion_result,
    prepare_dispersion,
)
from polkit.jobs.dispersion.stages import calibrate_problem_noise, refine_mode, whole_map_start
from polkit.jobs.steps import (
    checkpoint_file,
    job_identity,
    job_sampler,
    locks_output,
    posterior_theta,
    sample_problem,
)
from polkit.models import spectral

__all__ = [
    "CAVEATS",
    "ModelScore",
    "ModelComparison",
    "pointwise_log_likelihood",
    "information_criteria",
    "compare_dispersion_models",
]

log = logging.getLogger(__name__)

#: the file a comparison writes beside one folder per model
COMPARISON_FILE = "comparison.json"
POINTWISE_FILE = "comparison_pointwise.nc"
#: Pareto shape above which PSIS-LOO is unreliable (Vehtari et al., Stat. Comput. 27, 1413, 2017)
PARETO_K_LIMIT = 0.7
#: a difference in elpd is taken as real when larger than this many nats and this many
#: standard errors (value from memory: Sivula, Magnusson and Vehtari, arXiv:2008.10296)
MIN_DIFFERENCE_NATS = 4.0
MIN_DIFFERENCE_SE = 2.0

CAVEATS = (
    "elpd estimated by PSIS-LOO over spectra (one angle or k left out at a time), in nats; "
    "WAIC reported as a cross-check.",
    "amplitudes and backgrounds are solved per spectrum, not sampled; their optimism is "
    "removed by one nat per active coefficient (Akaike correction, exact only for a "
    "linear-Gaussian model with known noise).",
    "the criteria rank predictive accuracy, not truth; a tie is broken in favour of the "
    "simpler model by convention.",
    f"PSIS-LOO is unreliable for spectra with Pareto k > {PARETO_K_LIMIT}; they are counted.",
    "one noise model, calibrated on the reference model's mode, is shared by all models.",
)
#: sampled parameters' complexity order, for breaking ties
_SIMPLICITY = {"weak": 0, "two": 1, "three": 2}


# --------------------------------------------------------------------------------------
# pointwise log-likelihood and the criteria
# --------------------------------------------------------------------------------------
def pointwise_log_likelihood(
    problem: DispersionProblem, draws: np.ndarray, *, batch: int = 64
) -> tuple[np.ndarray, np.ndarray]:
    """Gaussian log density of each spectrum for each draw, and the active linear columns.

    Parameters
    ----------
    problem
        The fitted whole-map problem (its data, noise model and parameter space).
    draws
        Parameter vectors of shape ``(..., P)``.
    batch
        Draws evaluated per call (bounds the memory of the model maps).

    Returns
    -------
    (log_lik, active)
        ``log_lik`` of shape ``(..., A)`` in nats: ``sum_E log N(y | model, var / w)``
        over the unmasked pixels of each spectrum, with ``var = s^2 / inv_var`` (``s``
        the draw's noise scale); ``active`` of the same shape: solved coefficients of that
        spectrum that are not at their bound (non-zero amplitudes plus the background).
    """
    draws = np.asarray(draws, dtype=float)
    lead = draws.shape[:-1]
    flat = draws.reshape(-1, draws.shape[-1])
    w = problem.inv_var
    used = w > 0
    n_pix = used.sum(axis=1)  # (A,)
    # -1/2 sum log(2 pi var_pixel) for s = 1
    log_norm = -0.5 * np.sum(np.where(used, np.log(2.0 * np.pi) - np.log(np.where(used, w, 1.0)),
                                      0.0), axis=1)
    n_bg = problem.n_background_columns
    out = np.empty((flat.shape[0], w.shape[0]))
    act = np.empty_like(out)
    for start in range(0, flat.shape[0], batch):
        t = flat[start:start + batch]
        sol = spectral.project_linear(problem._weighted, None, problem.basis(t), nonneg=True,
                                      return_parts=True)
        s = problem._noise_scale(t)[:, None]
        out[start:start + batch] = (-0.5 * sol.chi2_per_angle / (s * s)
                                    - n_pix[None, :] * np.log(s) + log_norm[None, :])
        act[start:start + batch] = np.count_nonzero(sol.amplitudes > 0, axis=-1) + n_bg
    no_data = n_pix == 0
    out[:, no_data], act[:, no_data] = 0.0, 0.0
    return out.reshape(lead + (w.shape[0],)), act.reshape(lead + (w.shape[0],))


def _elpd_arviz(log_lik: np.ndarray, posterior: Mapping[str, np.ndarray]) -> dict[str, Any]:
    """PSIS-LOO and WAIC from ArviZ for a ``(chain, draw, spectrum)`` log-likelihood."""
    from polkit._arviz import arviz

    az = arviz()

    idata = az.from_dict(posterior=dict(posterior), log_likelihood={"spectrum": log_lik})
    with warnings.catch_warnings():
        # ArviZ warns about high Pareto k and about WAIC's variance check; both are
        # reported in the result instead (k counted, p_waic per spectrum kept)
        warnings.simplefilter("ignore", UserWarning)
        loo = az.loo(idata, pointwise=True, var_name="spectrum")
        waic = az.waic(idata, pointwise=True, var_name="spectrum")
    return {
        "loo_i": np.asarray(loo["loo_i"]).reshape(-1),
        "pareto_k": np.asarray(loo["pareto_k"]).reshape(-1),
        "waic_i": np.asarray(waic["waic_i"]).reshape(-1),
        "p_loo": float(loo["p_loo"]),
        "p_waic": float(waic["p_waic"]),
    }


def _total(pointwise: np.ndarray) -> tuple[float, float]:
    """Sum and standard error ``sqrt(n var)`` (Vehtari et al. 2017, eq. 23)."""
    n = pointwise.size
    return float(pointwise.sum()), float(np.sqrt(n * np.var(pointwise, ddof=1))) if n > 1 else 0.0


def information_criteria(
    log_lik: np.ndarray, active: np.ndarray, posterior: Mapping[str, np.ndarray]
) -> dict[str, Any]:
    """elpd by PSIS-LOO and WAIC with the correction for solved coefficients.

    Parameters
    ----------
    log_lik
        Pointwise log-likelihood, shape ``(chain, draw, spectrum)``, nats.
    active
        Active solved coefficients per draw and spectrum, same shape.
    posterior
        The draws ``{name: (chain, draw)}`` (ArviZ uses them for the relative
        efficiency of the importance sampling).

    Returns
    -------
    dict
        ``elpd_loo``, ``elpd_loo_se``, ``p_loo`` (sampled plus solved), ``elpd_waic``,
        ``elpd_waic_se``, ``p_waic``, ``linear_per_spectrum`` (mean active coefficients),
        ``max_pareto_k``, ``n_high_k`` and the corrected pointwise ``elpd_i`` and
        ``pareto_k``.
    """
    res = _elpd_arviz(log_lik, posterior)
    correction = active.reshape(-1, active.shape[-1]).mean(axis=0)  # (A,)
    loo_i = res["loo_i"] - correction
    waic_i = res["waic_i"] - correction
    elpd_loo, se_loo = _total(loo_i)
    elpd_waic, se_waic = _total(waic_i)
    k = res["pareto_k"]
    return {
        "elpd_loo": elpd_loo,
        "elpd_loo_se": se_loo,
        "p_loo": res["p_loo"] + float(correction.sum()),
        "elpd_waic": elpd_waic,
        "elpd_waic_se": se_waic,
        "p_waic": res["p_waic"] + float(correction.sum()),
        "linear_per_spectrum": float(correction.mean()),
        "max_pareto_k": float(np.nanmax(k)) if k.size else float("nan"),
        "n_high_k": int(np.count_nonzero(k > PARETO_K_LIMIT)),
        "elpd_i": loo_i,
        "pareto_k": k,
    }


# --------------------------------------------------------------------------------------
# the result
# --------------------------------------------------------------------------------------
@dataclass
class ModelScore:
    """The information criteria of one fitted model (nats; see the module notes)."""

    model: str
    elpd_loo: float
    elpd_loo_se: float
    p_loo: float
    elpd_waic: float
    elpd_waic_se: float
    p_waic: float
    linear_per_spectrum: float
    n_parameters: int
    max_pareto_k: float
    n_high_k: int
    converged: bool
    elpd_i: np.ndarray = field(repr=False)
    pareto_k: np.ndarray = field(repr=False)
    #: False when the data do not identify what the model adds (it is then "not needed")
    identified: bool = True
    identification: str = ""


_UNITS = {"elpd_loo": "nat", "elpd_loo_se": "nat", "p_loo": "1", "elpd_waic": "nat",
          "elpd_waic_se": "nat", "p_waic": "1", "linear_per_spectrum": "1",
          "n_parameters": "1", "max_pareto_k": "1", "n_high_k": "1",
          "elpd_difference": "nat", "elpd_difference_se": "nat"}


@dataclass
class ModelComparison:
    """Ranked models of one map, their fits and the caveats of the criterion.

    Attributes
    ----------
    scores
        ``{model: ModelScore}`` in the order fitted.
    fits
        ``{model: DispersionFit}``.
    reference
        The model whose mode calibrated the shared noise model.
    noise_note
        How the shared noise model was set.
    axis, in_plane
        The in-plane axis name and values (one spectrum each).
    """

    scores: dict[str, ModelScore]
    fits: dict[str, DispersionFit]
    reference: str
    noise_note: str
    axis: str
    in_plane: np.ndarray
    source: str = ""

    @property
    def ranking(self) -> list[str]:
        """Models from the highest elpd (LOO) down."""
        return sorted(self.scores, key=lambda m: -self.scores[m].elpd_loo)

    @property
    def converged(self) -> bool:
        """Every identified model's fit converged.

        A model whose addition the data do not identify (a second exciton that cannot be
        told apart from none) is reported as not needed; its sampler may wander along the
        unidentified direction without converging, which does not make the comparison
        unreliable.
        """
        return all(s.converged for s in self.scores.values() if s.identified)

    def difference(self, model: str, other: str | None = None) -> tuple[float, float]:
        """``elpd(model) - elpd(other)`` and its standard error (paired over spectra).

        ``other`` defaults to the best model.  Source: Vehtari et al., Stat. Comput. 27,
        1413 (2017), eq. 24 (``se = sqrt(n var(d_i))``).
        """
        other = self.ranking[0] if other is None else other
        d = self.scores[model].elpd_i - self.scores[other].elpd_i
        return _total(d)

    def preferred(self) -> str:
        """The simplest model not clearly worse than the best (the verdict's model).

        A model is clearly worse when its elpd is lower by more than
        ``MIN_DIFFERENCE_NATS`` and by more than ``MIN_DIFFERENCE_SE`` standard errors.
        """
        best = self.ranking[0]
        ties = [m for m in self.scores if not self._clearly_worse(m, best)
                and self.scores[m].identified]
        if not ties:
            ties = [m for m in self.scores if self.scores[m].identified] or list(self.scores)
        return min(ties, key=lambda m: _SIMPLICITY.get(m, 9))

    def _clearly_worse(self, model: str, best: str) -> bool:
        if model == best:
            return False
        d, se = self.difference(model, best)
        return -d > MIN_DIFFERENCE_NATS and -d > MIN_DIFFERENCE_SE * se

    def verdict(self) -> str:
        """One sentence: which model the data support, and by how much."""
        pick = self.preferred()
        others = []
        for m in self.ranking:
            if m == pick:
                continue
            d, se = self.difference(m, pick)
            clear = -d > MIN_DIFFERENCE_NATS and -d > MIN_DIFFERENCE_SE * se
            word = "clearly worse" if clear else (
                "better, but not clearly" if d > 0 else "not distinguishable")
            if not self.scores[m].identified:
                word = f"not needed: {self.scores[m].identification}"
            others.append(f"{m}: {d:+.1f} +/- {se:.1f} nat ({word})")
        text = f"preferred: {pick}" + (f"; against it, {'; '.join(others)}" if others else "")
        flags = []
        if not self.converged:
            flags.append("not every fit converged")
        high = sum(s.n_high_k for s in self.scores.values())
        if high:
            flags.append(f"{high} spectra with Pareto k > {PARETO_K_LIMIT}")
        return text + (f" [caution: {', '.join(flags)}]" if flags else "")

    def summary(self) -> dict[str, Any]:
        """JSON-ready summary: per-model scores with units, the verdict and the caveats."""
        models = {}
        best = self.ranking[0]
        for m, s in self.scores.items():
            d, se = self.difference(m, best)
            row = {k: getattr(s, k) for k in _UNITS if hasattr(s, k)}
            row.update(elpd_difference=d, elpd_difference_se=se)
            models[m] = {
                **{k: {"value": v, "units": _UNITS[k]} for k, v in row.items()},
                "converged": s.converged,
                "identified": s.identified,
                "identification": s.identification,
                "fit_model": self.fits[m].model if m in self.fits else m,
            }
        return json_safe({
            "criterion": "PSIS-LOO over spectra (WAIC as a cross-check)",
            "ranking": self.ranking,
            "preferred": self.preferred(),
            "verdict": self.verdict(),
            "converged": self.converged,
            "reference_model": self.reference,
            "noise_model": self.noise_note,
            "in_plane_axis": self.axis,
            "n_spectra": int(self.in_plane.size),
            "source": self.source,
            "models": models,
            "caveats": list(CAVEATS),
        })

    def table(self) -> str:
        """The comparison as a text table with a units row."""
        head = ("model", "elpd_loo", "+/-", "d_elpd", "+/-", "p_loo", "lin/spec", "max_k",
                "k>0.7", "converged")
        units = ("", "nat", "nat", "nat", "nat", "1", "1", "1", "spectra", "")
        rows = [head, units]
        best = self.ranking[0]
        for m in self.ranking:
            s = self.scores[m]
            d, se = self.difference(m, best)
            rows.append((m, f"{s.elpd_loo:.1f}", f"{s.elpd_loo_se:.1f}", f"{d:.1f}", f"{se:.1f}",
                         f"{s.p_loo:.1f}", f"{s.linear_per_spectrum:.2f}",
                         f"{s.max_pareto_k:.2f}", str(s.n_high_k),
                         "yes" if s.converged else
                         ("no (not needed)" if not s.identified else "NO")))
        widths = [max(len(r[i]) for r in rows) for i in range(len(head))]
        lines = ["  ".join(c.rjust(w) if i else c.ljust(w) for i, (c, w) in
                           enumerate(zip(r, widths, strict=True))) for r in rows]
        return "\n".join(lines + ["", self.verdict()])

    def __str__(self) -> str:
        return self.table()

    def _repr_html_(self) -> str:
        import html

        best = self.ranking[0]
        cells = []
        for m in self.ranking:
            s = self.scores[m]
            d, se = self.difference(m, best)
            cells.append(
                f"<tr><td>{html.escape(m)}</td><td>{s.elpd_loo:.1f} &plusmn; {s.elpd_loo_se:.1f}"
                f"</td><td>{d:.1f} &plusmn; {se:.1f}</td><td>{s.p_loo:.1f}</td>"
                f"<td>{s.max_pareto_k:.2f} ({s.n_high_k})</td>"
                f"<td>{_converged_cell(s)}</td></tr>")
        caveats = "".join(f"<li>{html.escape(c)}</li>" for c in CAVEATS)
        return (
            "<div><b>Dispersion model comparison</b> (PSIS-LOO over spectra, nat)"
            "<table><tr><th>model</th><th>elpd</th><th>&Delta; elpd to best</th>"
            "<th>p_loo</th><th>max Pareto k (&gt;0.7)</th><th>converged</th></tr>"
            f"{''.join(cells)}</table><p>{html.escape(self.verdict())}</p>"
            f"<details><summary>caveats</summary><ul>{caveats}</ul></details></div>")

    def pointwise(self) -> xr.Dataset:
        """Corrected pointwise elpd and Pareto k per model and spectrum."""
        models = list(self.scores)
        return xr.Dataset(
            {
                "elpd_i": (("model", self.axis), np.stack([self.scores[m].elpd_i for m in models]),
                           {"units": "nat", "long_name": "LOO elpd of each spectrum, corrected "
                            "for the solved coefficients"}),
                "pareto_k": (("model", self.axis),
                             np.stack([self.scores[m].pareto_k for m in models]),
                             {"units": "1", "long_name": "Pareto shape of PSIS"}),
            },
            coords={"model": models, self.axis: (self.axis, self.in_plane,
                                                 {"units": "degree" if self.axis == "angle"
                                                  else "1/um"})},
        )

    def save(self, folder: str | os.PathLike, *, figures: bool = False) -> Path:
        """Write ``comparison.json``, the pointwise table and each fit in ``folder/<model>``."""
        folder = Path(folder)
        folder.mkdir(parents=True, exist_ok=True)
        for m, fit in self.fits.items():
            fit.save(folder / m)
            if figures:
                fit.figures(folder / m)
        write_netcdf(folder / POINTWISE_FILE, self.pointwise())
        write_json(folder / COMPARISON_FILE, self.summary())
        return folder


# --------------------------------------------------------------------------------------
# the job
# --------------------------------------------------------------------------------------
def _converged_cell(s: ModelScore) -> str:
    if s.converged:
        return "yes"
    return "no (not needed)" if not s.identified else "<b>no</b>"


#: posterior probability below which the second exciton is "not identified" as strongly
#: coupled (common practice, no published source)
IDENTIFIED_PROBABILITY = 0.95


def _mark_unidentified(scores: dict[str, ModelScore], fits: Mapping[str, Any]) -> None:
    """Mark a three-oscillator fit whose second exciton the map does not identify.

    When the three-oscillator fit did not converge, is not clearly better than the
    two-oscillator fit, and its second exciton is not shown to be strongly coupled (the
    posterior probability that ``2 g_2 > (gamma_C + gamma_X2)/2``, the visibility
    condition of a splitting, Savona et al., Solid State Commun. 93, 733 (1995), is below
    ``IDENTIFIED_PROBABILITY``), the second exciton is not needed: its coupling, energy
    and width trade off along directions the data do not constrain, which is why the
    sampler did not converge.  The score is kept and marked; the comparison's
    convergence is judged on the identified models.
    """
    three, two = scores.get("three"), scores.get("two")
    if three is None or two is None or three.converged or "three" not in fits:
        return
    fit = fits["three"]
    try:
        r2 = fit.draws("rabi_splitting2")
        visible = 0.5 * (fit.draws("cavity_linewidth") + fit.draws("exciton2_linewidth"))
    except Exception:  # noqa: BLE001 - a fit without these draws is left as it is
        return
    p_strong = float(np.mean(r2 > visible))
    d, se = _total(three.elpd_i - two.elpd_i)
    clearly_better = d > MIN_DIFFERENCE_NATS and d > MIN_DIFFERENCE_SE * se
    if p_strong < IDENTIFIED_PROBABILITY and not clearly_better:
        three.identified = False
        three.identification = (
            f"the map does not identify a second exciton (P(2g2 > (gamma_C + gamma_X2)/2) = "
            f"{p_strong:.2f}; elpd {d:+.1f} +/- {se:.1f} nat against two oscillators), so its "
            "fit could not converge; the data do not need it")
        log.info("comparison: %s", three.identification)


def _split_priors(priors, spaces: Mapping[str, Any]) -> dict[str, dict | None]:
    """One prior dict per model: the tables naming that model's parameters."""
    if priors is None:
        return {m: None for m in spaces}
    table = dict(read_prior_file(priors)) if not isinstance(priors, Mapping) else dict(priors)
    known = set().union(*(s.names for s in spaces.values()))
    unknown = sorted(set(table) - known)
    if unknown:
        raise ConfigError(
            f"unknown parameter {unknown[0]!r}: none of the compared models has it "
            f"(known: {', '.join(sorted(known))}); remove it or fix the name.",
            path=None if isinstance(priors, Mapping) else priors, key=unknown[0])
    return {m: {k: v for k, v in table.items() if k in s.names} or None
            for m, s in spaces.items()}


def _cross_started_modes(prepared: Mapping[str, tuple]) -> dict[str, np.ndarray]:
    """Whole-map mode of each model, started from its own peak table and from the others.

    The peak table is matched to the branches of each model; for the uncoupled model, a
    cavity line crossing the exciton line gives peaks that a per-angle fit places poorly
    and its table mode can be far off.  Each model is therefore started from its table mode
    and from its raw guess (:func:`whole_map_start`), then from the other models'
    whole-map modes (shared parameters copied, the rest from its own mode), and the start
    with the highest whole-map posterior is kept.  # common practice, no published source
    """
    own = {}
    for m, (problem, begin) in prepared.items():
        own[m] = whole_map_start(problem, begin.x0)
    best = dict(own)
    for m, (problem, _) in prepared.items():
        names = problem.space.names
        for other, mode in own.items():
            if other == m:
                continue
            theirs = dict(zip(prepared[other][0].space.names, mode.x, strict=True))
            x = np.array([theirs.get(n, v) for n, v in zip(names, own[m].x, strict=True)])
            inside = np.isfinite(problem.space.log_prior(x[None, :])).all()
            if not inside:
                continue
            cand = refine_mode(problem, x, staged=True)
            if cand.log_post > best[m].log_post:
                log.info("comparison: the %s model starts from the %s mode", m, other)
                best[m] = cand
    return {m: r.x for m, r in best.items()}


@locks_output
def compare_dispersion_models(
    source: str | os.PathLike | xr.DataArray,
    *,
    models: Sequence[str] = ("weak", "two", "three"),
    kind: str | None = None,
    priors: str | os.PathLike | dict | None = None,
    seed: int | np.random.SeedSequence | None = None,
    out: str | os.PathLike | None = None,
    max_steps: int | None = None,
    min_steps: int | None = None,
    n_walkers: int | None = None,
    n_draws: int = 2000,
    progress: bool = True,
    wavelength_medium: str | None = None,
    angle_window: tuple[float, float] | None = None,
    energy_window: tuple[float, float] | None = None,
    load_options: dict | None = None,
    figures: bool = False,
    resume: bool = False,
) -> ModelComparison:
    """Fit several dispersion models to one map and rank them by PSIS-LOO.

    Parameters
    ----------
    source
        A map file or a canonical map (whole-map fits; emission or reflectance).
    models
        Two or more of ``"weak"`` (uncoupled modes), ``"two"`` and ``"three"``.
    kind, priors, wavelength_medium, angle_window, energy_window, load_options
        As in :func:`polkit.jobs.dispersion.run.fit_dispersion`; a prior table naming a
        parameter applies to every model that has it.
    seed
        Root seed; each model gets its own child of it (recorded in its result).
    out
        Output folder: ``comparison.json``, ``comparison_pointwise.nc`` and one folder
        per model with its ``posterior.nc`` and ``summary.json``.
    max_steps, min_steps, n_walkers
        Sampler limits of each fit.
    n_draws
        Posterior draws (over all walkers) used for the criteria.
    progress
        Progress bars.
    figures
        Also write each model's figures.
    resume
        Continue each model's fit from its checkpoint in ``out/<model>/chains.h5`` (same
        map, priors, seed and limits as the interrupted run).

    Returns
    -------
    ModelComparison

    Warns
    -----
    ConvergenceWarning
        When a fit did not converge (the comparison is then not converged).
    DataWarning
        When some spectra have Pareto k above 0.7 (PSIS-LOO unreliable there).
    """
    if resume and seed is None:
        raise ConfigError("resuming a comparison needs the seed of the interrupted run (it "
                          "was printed when the run started); pass --seed N with --resume.",
                          key="seed")
    models = list(dict.fromkeys(models))
    bad = [m for m in models if m not in MODELS]
    if bad or len(models) < 2:
        raise ConfigError(
            f"expected two or more of {', '.join(MODELS)}; found {', '.join(models) or 'none'}",
            key="models")
    sampler = job_sampler(DEFAULT_STEPS, SamplerSettings(
        max_steps=max_steps, min_steps=min_steps, n_walkers=n_walkers, progress=progress))
    opts = dict(kind=kind, wavelength_medium=wavelength_medium, angle_window=angle_window,
                energy_window=energy_window, load_options=load_options)
    prepared = {m: prepare_dispersion(source, model=m, **opts) for m in models}
    per_model = _split_priors(priors, {m: p.space for m, (p, _) in prepared.items()})
    if priors is not None:
        prepared = {m: prepare_dispersion(source, model=m, priors=per_model[m], **opts)
                    for m in models}
    # modes, then one noise model from the reference model's mode, shared by all
    modes = _cross_started_modes(prepared)
    reference = next((m for m in ("two", "three") if m in models), models[0])
    ref_problem, ref_begin = prepared[reference]
    noise_note = calibrate_problem_noise(ref_problem, modes[reference],
                                         ref_begin.source.data.attrs)
    noise_note = f"shared by all models, calibrated on the '{reference}' mode: {noise_note}"
    root = seed if isinstance(seed, np.random.SeedSequence) else np.random.SeedSequence(seed)
    children = dict(zip(models, root.spawn(len(models)), strict=True))
    scores, fits = {}, {}
    for m in models:
        problem, begin = prepared[m]
        problem.set_noise(ref_problem.inv_var, noise_note)
        start = refine_mode(problem, modes[m])
        ckpt = checkpoint_file(Path(out) / m if out is not None else None, resume,
                               refusal=ConfigError("resume needs the output folder of the "
                                                   "comparison; pass out= (--out).",
                                                   key="resume"))
        if ckpt is not None:
            ckpt.parent.mkdir(parents=True, exist_ok=True)
        log.info("comparison: sampling the %s model", m)
        with warnings.catch_warnings():
            warnings.simplefilter("ignore", ConvergenceWarning)  # summarised below
            output = sample_problem(problem, start, sampler=sampler,
                                    seed=children[m], pre_burn=True, checkpoint=ckpt,
                                    resume=resume,
                                    identity=job_identity(
                                        begin.source.sha256, f"{m} {begin.source.kind}",
                                        "whole_map", noise_note,
                                        dict(opts, models=list(models))))
            fit = build_dispersion_result(problem, output, begin.source, noise_note=noise_note,
                                          table=begin.table,
                                          provenance={"model_comparison": ", ".join(models)})
        theta = posterior_theta(output, problem.space)  # (chain, draw, P)
        step = max(1, int(np.ceil(theta.shape[0] * theta.shape[1] / n_draws)))
        theta = theta[:, ::step]
        ll, active = pointwise_log_likelihood(problem, theta)
        post = {n: theta[..., i] for i, n in enumerate(problem.space.names)}
        crit = information_criteria(ll, active, post)
        scores[m] = ModelScore(model=m, n_parameters=len(problem.space),
                               converged=bool(output.converged), **crit)
        fits[m] = fit
    _mark_unidentified(scores, fits)
    axis = prepared[models[0]][0].axis
    comparison = ModelComparison(scores, fits, reference, noise_note, axis,
                                 np.asarray(prepared[models[0]][0].in_plane),
                                 source=str(prepared[models[0]][1].source.source_name))
    if not comparison.converged:
        which = [m for m, s in scores.items() if not s.converged and s.identified]
        warnings.warn(f"model comparison: the {', '.join(which)} fit did not converge; its "
                      "elpd is not reliable (rerun with a larger max_steps).",
                      ConvergenceWarning, stacklevel=2)
    high = {m: s.n_high_k for m, s in scores.items() if s.n_high_k}
    if high:
        warnings.warn("model comparison: PSIS-LOO is unreliable for some spectra (Pareto k > "
                      f"{PARETO_K_LIMIT}): " + ", ".join(f"{m} {n}" for m, n in high.items())
                      + "; compare the WAIC column and read the differences with care.",
                      DataWarning, stacklevel=2)
    if out is not None:
        comparison.save(out, figures=figures)
    return comparison
