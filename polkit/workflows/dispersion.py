"""The dispersion job: an angle-resolved map in, the linear parameters of the sample out.

Steps (each a decision a practitioner would otherwise make by hand):

1. load and validate the map (:func:`polkit.data.load_map`), crop to the requested window;
2. per-angle peak table (:func:`polkit.extract.peak_table`); with only one branch visible,
   a warning that g and the detuning are degenerate;
3. automatic starting point from the peak table (multi-start least squares), default
   priors from the data range, user priors on top;
4. peak-table fit (MAP; with ``peaks_only`` also the MCMC, a fast answer);
5. whole-map fit: MAP from the peak-table mode, noise model calibrated on the MAP
   residuals (variance = a * model + b), then emcee until the convergence gate passes,
   checkpointed in HDF5;
6. derived quantities per posterior draw, result object, files and figures.
"""

from __future__ import annotations

import hashlib
import logging
import os
import warnings
from pathlib import Path
from typing import Any

import numpy as np
import xarray as xr

from ..errors import ConvergenceWarning, DataError
from ..inference import FitResult, LogPosterior, apply_priors, find_map, run_ensemble
from .dispersion_model import (
    MODELS,
    DispersionProblem,
    default_space,
    guess_from_peaks,
    in_plane_axis,
    noise_inverse_variance,
)

__all__ = ["fit_dispersion", "calibrate_noise", "file_sha256", "DispersionFit"]

log = logging.getLogger(__name__)

DEFAULT_STEPS = {"max_steps": 10000, "min_steps": 400, "check_every": 100}
CHECKPOINT = "chains.h5"


def file_sha256(path: str | os.PathLike) -> str:
    """Hex SHA-256 of a file (provenance of every result)."""
    h = hashlib.sha256()
    with open(path, "rb") as fh:
        for block in iter(lambda: fh.read(1 << 20), b""):
            h.update(block)
    return h.hexdigest()


def _array_sha256(da: xr.DataArray) -> str:
    h = hashlib.sha256(np.ascontiguousarray(da.values, dtype=float).tobytes())
    for name in da.dims:
        h.update(np.ascontiguousarray(da[name].values, dtype=float).tobytes())
    return h.hexdigest()


def _leverage(design: np.ndarray, inv_var: np.ndarray) -> np.ndarray:
    """Diagonal of the weighted hat matrix per angle, ``h = w x^T (X^T W X)^-1 x``.

    Computed stably from a thin QR factorisation of ``sqrt(W) X`` (``h`` is the row sum of
    ``Q^2``); nearly collinear columns (a reflectance column close to the constant
    background) then give leverages in [0, 1] instead of round-off.  ``design`` has shape
    ``(A, E, K)``.
    """
    q, r = np.linalg.qr(design * np.sqrt(inv_var)[..., None])
    diag = np.abs(np.diagonal(r, axis1=-2, axis2=-1))
    keep = diag > 1e-10 * np.max(diag, axis=-1, keepdims=True)  # drop dependent columns
    return np.einsum("aek,ak->ae", q * q, keep.astype(float))


def calibrate_noise(
    y: np.ndarray,
    model: np.ndarray,
    *,
    gain: float | None = None,
    read_noise: float | None = None,
    design: np.ndarray | None = None,
):
    """Variance function ``var = a * max(model, 0) + b`` for the whole-map likelihood.

    The variance is a function of the *model* (not of the noisy data), so the weights do
    not correlate with the noise.  With a known CCD gain (electrons per count) and read
    noise the detector model is used as it stands: ``a = 1/gain``, ``b = read_noise^2``.
    Otherwise ``a`` and ``b`` are estimated from the squared residuals ``r^2`` of the MAP,
    whose expectation is ``a m + b``: iteratively reweighted least squares with weights
    ``1/(a m + b)^2`` (the variance of ``r^2`` for Gaussian noise is ``2 var^2``), which is
    unbiased, unlike a robust loss on the skewed ``r^2``.  With ``design`` (the per-angle
    linear columns, shape ``(A, E, K)``) the squared residuals are first divided by
    ``1 - h`` (``h`` the leverage): a fitted amplitude absorbs part of the noise where its
    column is large, so ``E[r^2] = var (1 - h)``.  # common practice (variance-function
    estimation by IRLS with leverage correction, e.g. Carroll and Ruppert, Transformation
    and Weighting in Regression, 1988)
    Returns ``(inverse_variance, a, b)``.
    """
    ok = np.isfinite(y) & np.isfinite(model)
    m_all = np.clip(model, 0.0, None)
    if gain is not None and read_noise is not None:
        a, b = 1.0 / float(gain), float(read_noise) ** 2
    else:
        m = m_all[ok]
        r2_all = (y - model) ** 2
        if design is not None:
            lev = _leverage(design, np.where(ok, 1.0 / (m_all + np.median(r2_all[ok])), 0.0))
            r2_all = r2_all / np.clip(1.0 - lev, 0.05, 1.0)  # h <= 0.95
        r2 = r2_all[ok]
        design = np.stack([m, np.ones_like(m)], axis=1)
        if gain is not None:
            a = 1.0 / float(gain)
            b = max(float(np.mean(r2 - a * m)), 1e-12 * float(np.mean(r2)) + 1e-300)
        else:
            a, b = 0.0, float(np.mean(r2)) or 1.0
            for _ in range(6):
                w = 1.0 / (a * m + b) ** 2
                coef, *_ = np.linalg.lstsq(
                    design * np.sqrt(w)[:, None], r2 * np.sqrt(w), rcond=None
                )
                a, b = float(coef[0]), float(coef[1])
                if a < 0.0:  # no shot-noise term: the variance is a constant, its mean
                    a, b = 0.0, float(np.mean(r2))
                if b <= 0:
                    b = max(float(np.mean(r2 - a * m)), 1e-3 * float(np.mean(r2)))
    var = a * m_all + b
    inv = np.where(np.isfinite(y), 1.0 / var, 0.0)
    return inv, float(a), float(b)


class DispersionFit(FitResult):
    """A dispersion result: a :class:`~polkit.inference.FitResult` that can redraw its figures."""

    def figures(self, folder: str | os.PathLike) -> list[Path]:
        from .. import plots

        return plots.dispersion_figures(self, folder)


def _load(source, kind, wavelength_medium, load_options):
    from .. import data

    opts = dict(load_options or {})
    if wavelength_medium is not None:
        opts["wavelength_medium"] = wavelength_medium
    if isinstance(source, xr.DataArray):
        da = data.validate_map(source)
        return da, _array_sha256(da), da.attrs.get("source", "<in memory>")
    path = Path(source)
    da = data.load_map(path, **opts)
    return da, file_sha256(path), str(path)


def fit_dispersion(
    source: str | os.PathLike | xr.DataArray,
    *,
    model: str = "two",
    kind: str | None = None,
    peaks_only: bool = False,
    priors: str | os.PathLike | dict | None = None,
    seed: int | np.random.SeedSequence | None = None,
    resume: bool = False,
    strict: bool = False,
    out: str | os.PathLike | None = None,
    max_steps: int | None = None,
    min_steps: int | None = None,
    n_walkers: int | None = None,
    progress: bool = True,
    wavelength_medium: str | None = None,
    angle_window: tuple[float, float] | None = None,
    energy_window: tuple[float, float] | None = None,
    load_options: dict | None = None,
    stop_event=None,
    figures: bool = True,
    profile: str = "lorentzian",
) -> DispersionFit:
    """Fit a coupled-oscillator model to an angle-resolved map.

    Parameters
    ----------
    source
        A map file (any format :func:`polkit.load_map` reads) or a canonical map.
    model
        ``"two"`` (photon + one exciton) or ``"three"`` (photon + two excitons).
    kind
        ``"emission"`` or ``"reflectance"``; default from the map's attributes.
    peaks_only
        Fit the per-angle peak table only (fast; seeds the whole-map fit otherwise).
    priors
        TOML file or dict of priors overriding the defaults (keys: parameter names).
    seed
        Root seed (recorded; the same seed gives the same summary).
    resume
        Continue from ``out/chains.h5``.
    strict
        Four ensembles gated on nested R-hat <= 1.01.
    out
        Output folder (``posterior.nc``, ``summary.json``, figures, ``chains.h5``); nothing
        is written when ``None`` (then ``resume`` is unavailable).
    max_steps, min_steps, n_walkers
        Sampler limits (defaults 10000, 400 and 32; more walkers for the three-oscillator model).
    progress
        Progress bar (tqdm.auto).
    angle_window, energy_window
        Crop before fitting (degree or 1/um; eV).
    stop_event
        A :class:`threading.Event` that ends sampling early (result marked not converged).
    figures
        Write figures to ``out``.
    profile
        Peak shape of the peak table, ``"lorentzian"`` or ``"voigt"``.

    Returns
    -------
    DispersionFit
        Posterior, derived quantities, diagnostics and provenance.
    """
    from .. import data
    from ..extract import peak_table

    if model not in MODELS:
        raise DataError(f"expected model 'two' or 'three', found {model!r}.", field="model")
    n_exc = MODELS[model]
    da, sha, source_name = _load(source, kind, wavelength_medium, load_options)
    kind = kind or da.attrs.get("kind", "emission")
    if kind == "transmission":
        kind_model = "emission"  # transmission peaks follow the photon spectral function too
    elif kind in ("emission", "reflectance"):
        kind_model = kind
    else:
        raise DataError(
            f"expected kind 'emission', 'reflectance' or 'transmission', found {kind!r}.",
            path=source_name,
            field="kind",
        )
    if angle_window is not None or energy_window is not None:
        axis = in_plane_axis(da)
        da = data.crop(
            da,
            **{axis: angle_window} if angle_window is not None else {},
            **({"energy": energy_window} if energy_window is not None else {}),
        )
    axis = in_plane_axis(da)
    da = da.transpose(axis, "energy")

    # peak_table warns (DataWarning) when only one branch is visible: g and detuning degenerate
    table = peak_table(da, n_peaks=n_exc + 1, profile=profile)
    guess = guess_from_peaks(table, n_excitons=n_exc)
    space = default_space(da["energy"].values, guess, n_excitons=n_exc, kind=kind_model)
    if priors is not None:
        space = apply_priors(space, priors, path=priors if not isinstance(priors, dict) else None)
    x0 = np.array([_clip_into(p, guess.get(p.name, _default_start(p.name, guess))) for p in space])

    inv_var, noise_note = noise_inverse_variance(da)
    problem = DispersionProblem(
        axis=axis,
        in_plane=da[axis].values.astype(float),
        energy=da["energy"].values.astype(float),
        y=np.asarray(da.values, dtype=float),
        inv_var=inv_var,
        space=space,
        n_excitons=n_exc,
        kind=kind_model,
        table=table,
        noise_note=noise_note,
    )

    out_dir = Path(out) if out is not None else None
    checkpoint = (out_dir / CHECKPOINT) if out_dir is not None else None
    if resume and checkpoint is None:
        raise DataError(
            "resume needs the output folder that holds the checkpoint; pass out=.", field="resume"
        )
    if checkpoint is not None and checkpoint.exists() and not resume:
        checkpoint.unlink()  # a fresh run replaces an old checkpoint explicitly
    steps = dict(DEFAULT_STEPS)
    if max_steps is not None:
        steps["max_steps"] = int(max_steps)
        steps["min_steps"] = min(steps["min_steps"], int(max_steps))
    if min_steps is not None:
        steps["min_steps"] = int(min_steps)
    steps["check_every"] = min(steps["check_every"], steps["max_steps"])
    walkers = n_walkers or max(32, 4 * len(space))

    table_post = LogPosterior(problem.table_log_likelihood, space)
    table_map = find_map(table_post, space, x0)
    log.info("peak-table mode: %s", dict(zip(space.names, np.round(table_map.x, 6), strict=True)))
    if peaks_only:
        path_used, like, start = "peak_table", problem.table_log_likelihood, table_map
        noise_note = "peak-table errors from the per-angle line fits, times noise_scale"
    else:
        path_used, like = "whole_map", problem.log_likelihood
        start = _staged_map(problem.log_likelihood, space, table_map.x)
        # calibrate the variance function on the MAP residuals, then refine the mode
        sol = problem.model_map(start.x)
        model_map = np.asarray(sol.model).reshape(problem.y.shape)
        counts = str(da.attrs.get("units", "")).strip() == "counts" and kind_model == "emission"
        design = np.moveaxis(np.asarray(problem.basis(start.x[None, :]))[0], 1, 2)  # (A, E, K)
        design = np.concatenate([design, np.ones(design.shape[:2] + (1,))], axis=2)
        inv_var, a, b = calibrate_noise(
            problem.y,
            model_map,
            design=design,
            gain=da.attrs.get("gain") if counts else None,
            read_noise=da.attrs.get("read_noise") if counts else None,
        )
        noise_note = (
            f"variance = a * model + b with a = {a:.4g}, b = {b:.4g} (squared signal units; "
            + (
                "CCD gain and read noise from the file"
                if counts
                and da.attrs.get("gain") is not None
                and da.attrs.get("read_noise") is not None
                else "fitted to the MAP residuals"
            )
            + "), times noise_scale^2"
        )
        problem.set_noise(inv_var, noise_note)
        start = find_map(LogPosterior(problem.log_likelihood, space), space, start.x)

    if not (resume and checkpoint is not None and checkpoint.exists()):
        if seed is None:  # one recorded root for the pre-burn and the run
            seed = np.random.SeedSequence()
        start = _preburn(like, space, start, walkers, seed, steps["max_steps"])
    output = run_ensemble(
        like,
        space,
        start,
        n_walkers=walkers,
        seed=seed,
        checkpoint=checkpoint,
        resume=resume,
        progress=progress,
        strict=strict,
        stop_event=stop_event,
        **steps,
    )

    post_ds = output.posterior_draws()
    theta = np.stack([post_ds[n].values for n in space.names], axis=-1)
    derived = problem.derived(theta)
    strong = derived.pop("strong_coupling")
    derived["strong_coupling_probability"] = (
        np.asarray(strong[0].mean()),
        "1",
        "posterior probability that 2g > (gamma_C + gamma_X)/2",
    )
    observed = xr.Dataset({"map": da.assign_attrs(dict(da.attrs))})
    observed["inverse_variance"] = (
        (axis, "energy"),
        problem.inv_var,
        {"units": f"1/({da.attrs.get('units', '1')})^2"},
    )
    for name in ("energy", "energy_error", "fwhm", "fwhm_error", "found"):
        if name in table:
            observed[f"peak_{name}"] = (
                table[name].rename({"peak": "peak_index"})
                if "peak" in table[name].dims
                else table[name]
            )
    for key in ("source", "sample", "position"):
        if key in da.attrs:
            observed.attrs[key] = str(da.attrs[key])
    prov: dict[str, Any] = {
        "input_sha256": sha,
        "input": source_name,
        "path": path_used,
        "noise_model": noise_note,
        "peak_profile": profile,
    }
    result = DispersionFit.from_samples(
        output,
        space,
        derived=derived,
        model=f"{model}_oscillator",
        kind=kind_model,
        observed=observed,
        provenance=prov,
        extra_attrs={"fit_path": path_used, "in_plane_axis": axis, "n_excitons": n_exc},
    )
    if out_dir is not None:
        result.save(out_dir)
        if figures:
            result.figures(out_dir)
    return result


#: parameters the peak table leaves loosely determined; refined first with the rest fixed
_SHAPE_PARAMETERS = (
    "cavity_linewidth",
    "exciton_linewidth",
    "exciton2_linewidth",
    "mirror_fraction",
    "noise_scale",
)


def _staged_map(like, space, x_table: np.ndarray):
    """Whole-map mode in two stages, starting from the peak-table mode.

    The peak table fixes the branch positions well but says little about line shapes and
    nothing about the top-mirror coupling; a direct optimisation of every parameter from
    there can fall into a poor local mode (shallow dips traded for wrong positions).  Stage
    1 optimises the line-shape parameters with the positions held at the peak-table mode
    (several starts of the mirror share for reflectance); stage 2 frees everything.
    # common practice, no published source
    """
    from ..inference import ParameterSpace

    free = [i for i, n in enumerate(space.names) if n in _SHAPE_PARAMETERS]
    x = np.array(x_table, dtype=float)
    if free:
        sub = ParameterSpace([space[space.names[i]] for i in free])

        def sub_like(t):
            full = np.repeat(x[None, :], t.shape[0], axis=0)
            full[:, free] = t
            return like(full)

        sub_post = LogPosterior(sub_like, sub)
        starts = [x[free]]
        if "mirror_fraction" in sub.names:
            j = sub.names.index("mirror_fraction")
            for f in (0.25, 0.75, 0.95):
                s0 = x[free].copy()
                s0[j] = f
                starts.append(s0)
        best = max((find_map(sub_post, sub, s0) for s0 in starts), key=lambda m: m.log_post)
        x[free] = best.x
    return find_map(LogPosterior(like, space), space, x)


def _preburn(like, space, start, n_walkers: int, seed, max_steps: int) -> np.ndarray:
    """A short burn-in from the MAP ball, then stragglers replaced: the starting ensemble.

    A walker that starts in a poor local mode can stay there for the whole run (the moves
    of an affine-invariant ensemble rarely carry it across).  After ``n`` steps, walkers
    whose log posterior lies more than ``10 max(MAD, 1)`` below the median are moved onto
    copies of good walkers with a small jitter (1e-3 of the ensemble spread), as is common
    practice for ensemble samplers.  Deterministic for a given seed (its own spawned seed).
    # common practice, no published source
    """
    n = int(min(300, max(50, max_steps // 5)))
    root = seed if isinstance(seed, np.random.SeedSequence) else np.random.SeedSequence(seed)
    pre_seed = np.random.SeedSequence(root.entropy, spawn_key=(*root.spawn_key, 0xB0))
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)  # short on purpose
        out = run_ensemble(
            like,
            space,
            start,
            n_walkers=n_walkers,
            seed=pre_seed,
            max_steps=n,
            min_steps=n,
            check_every=n,
            progress=False,
        )
    pos = out.chains[0, -1].copy()
    lp = out.log_prob[0, -1]
    med = np.median(lp)
    mad = 1.4826 * np.median(np.abs(lp - med))
    bad = ~(lp >= med - 10.0 * max(mad, 1.0))
    if bad.any():
        rng = np.random.default_rng(pre_seed.spawn(1)[0])
        good = np.flatnonzero(~bad)
        spread = np.std(pos[good], axis=0) + 1e-12
        donors = rng.choice(good, size=int(bad.sum()))
        pos[bad] = pos[donors] + 1e-3 * spread * rng.standard_normal((int(bad.sum()), pos.shape[1]))
        lo, hi = space.bounds.T
        pos[bad] = np.clip(pos[bad], lo + 1e-12 * (hi - lo), hi - 1e-12 * (hi - lo))
        log.info("pre-burn: %d straggling walker(s) moved onto good ones", int(bad.sum()))
    return pos


def _clip_into(param, value: float) -> float:
    lo, hi = param.prior.bounds
    if not np.isfinite(value):
        value = 0.5 * (lo + hi) if np.isfinite(lo) and np.isfinite(hi) else 1.0
    eps = 1e-6 * (hi - lo) if np.isfinite(hi - lo) else 1e-6
    return float(np.clip(value, lo + eps, hi - eps))


def _default_start(name: str, guess: dict) -> float:
    if name == "noise_scale":
        return 1.0
    if name == "mirror_fraction":
        return 0.5
    return float("nan")
