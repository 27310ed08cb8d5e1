"""The steps of the dispersion job before sampling, one function each.

:func:`polkit.jobs.dispersion.run.fit_dispersion` takes them in order and the
interactive panel (:mod:`polkit.widgets.dispersion_panel`) one at a time, on the window
the person chooses:

* :func:`open_map`: load and validate the map, check the model and the kind of spectrum;
* :func:`peak_start`: per-angle peak table, automatic guess, parameter space with priors;
* :func:`start_vector`: the guess as a vector inside the priors;
* :func:`map_problem`: the :class:`~polkit.jobs.dispersion.problem.DispersionProblem`
  with its first noise model;
* :func:`table_mode`, :func:`refine_mode`: the peak-table and whole-map modes;
* :func:`calibrate_problem_noise`: the noise model calibrated on the residuals of a mode.
"""

from __future__ import annotations

import dataclasses
import hashlib
import logging
import os
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import TYPE_CHECKING, Any

import numpy as np
import xarray as xr

from polkit.config.priors import apply_priors
from polkit.errors import ConfigError, DataError
from polkit.files import file_sha256
from polkit.inference import LogPosterior, MapResult, ParameterSpace, find_map
from polkit.jobs.dispersion.noise import calibrate_noise, noise_inverse_variance
from polkit.jobs.dispersion.parameters import default_space, guess_from_peaks
from polkit.jobs.dispersion.problem import MODELS, DispersionProblem, in_plane_axis
from polkit.jobs.steps import clip_into

if TYPE_CHECKING:
    from polkit.data import LoadOptions

__all__ = [
    "MapInput",
    "DispersionStart",
    "open_map",
    "loader_changes",
    "peak_start",
    "start_vector",
    "map_problem",
    "table_mode",
    "refine_mode",
    "whole_map_start",
    "calibrate_problem_noise",
]

log = logging.getLogger(__name__)

#: the per-angle background of emission maps
EMISSION_BACKGROUND = "linear"


def _array_sha256(da: xr.DataArray) -> str:
    h = hashlib.sha256(np.ascontiguousarray(da.values, dtype=float).tobytes())
    for name in da.dims:
        h.update(np.ascontiguousarray(da[name].values, dtype=float).tobytes())
    return h.hexdigest()


# --------------------------------------------------------------------------------------
# the map
# --------------------------------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class MapInput:
    """A map ready for fitting, and where it came from (built by :func:`open_map`).

    Attributes
    ----------
    data
        The canonical map, dims (``angle`` [degree] or ``k`` [1/um], ``energy`` [eV]).
    sha256
        Hex SHA-256 of the file, or of the values and axes of an in-memory map.
    source_name
        The file path as given, or the map's ``source`` attribute.
    model
        ``"two"`` or ``"three"`` oscillators, or ``"weak"`` (uncoupled modes).
    kind
        The spectral model: ``"emission"`` (also for transmission) or ``"reflectance"``.
    """

    data: xr.DataArray
    sha256: str
    source_name: str
    model: str
    kind: str

    @property
    def axis(self) -> str:
        """The in-plane dimension, ``angle`` or ``k``."""
        return in_plane_axis(self.data)

    @property
    def coupling(self) -> str:
        """``"weak"`` for the uncoupled-modes model, else ``"strong"``."""
        return "weak" if self.model == "weak" else "strong"

    @property
    def n_excitons(self) -> int:
        """Number of exciton oscillators of the model."""
        return MODELS[self.model]

    def cropped(self, axis_window: tuple[float, float] | None = None,
                energy_window: tuple[float, float] | None = None) -> MapInput:
        """This input with its map cropped to the given windows (degree or 1/um; eV).

        Without either window the input is returned as it is.
        """
        if axis_window is None and energy_window is None:
            return self
        from polkit import data

        da = data.crop(
            self.data,
            **{self.axis: axis_window} if axis_window is not None else {},
            **({"energy": energy_window} if energy_window is not None else {}),
        )
        return dataclasses.replace(self, data=da.transpose(self.axis, "energy"))


#: LoadOptions fields a dispersion job reads itself (the rest go to the file loader)
_JOB_FIELDS = ("kind", "wavelength_medium", "angle_window", "energy_window", "camera",
               "reader_options")


def loader_changes(load: LoadOptions) -> dict[str, Any]:
    """The loader options of ``load`` that differ from the defaults, as a plain dict.

    Everything but the spectrum kind, the wavelength medium, the windows and the camera
    (which the job handles itself); a reader's own options are merged in.  This is what
    the file loader receives beside the medium, and what a fit records of the loading in
    its identity (``load_options``).
    """
    from polkit.data import LoadOptions

    default = LoadOptions()
    out = {f.name: getattr(load, f.name) for f in dataclasses.fields(load)
           if f.name not in _JOB_FIELDS
           and _differs(getattr(load, f.name), getattr(default, f.name))}
    out.update(load.reader_options)
    return out


def _differs(value, default) -> bool:
    """Whether an option's value is not its default (anything not comparable differs)."""
    try:
        return bool(value != default)
    except (TypeError, ValueError):
        return True


def _load(source, load: LoadOptions):
    """The map, its hash and name; with ``load.camera`` the camera steps are applied.

    A file's offset and saturation are handled by the loader on the raw counts (before
    any unit conversion); spikes and excluded windows on the canonical map
    (:func:`polkit.data.prepare_camera_map`).  The hash is that of the input as given.
    """
    from polkit import data

    camera = load.camera
    opts = loader_changes(load)
    if load.wavelength_medium is not None:
        opts["wavelength_medium"] = load.wavelength_medium
    if isinstance(source, xr.DataArray):
        if opts:  # a map in memory was read already: these would be silently ignored
            raise ConfigError(
                f"loader options {', '.join(sorted(opts))} apply when reading a file; this "
                "map is already in memory. Fix: read the file with polkit.load_map(path, "
                "...) and those options, or leave them out",
                key="load options")
        da = data.validate_map(source)
        sha, name = _array_sha256(da), da.attrs.get("source", "<in memory>")
    else:
        path = Path(source)
        if camera is not None:
            opts.setdefault("dark", camera.dark)
            opts.setdefault("mask_saturated", camera.mask_saturated)
        da = data.load_map(path, **opts)
        sha, name = file_sha256(path), str(path)
    if camera is not None:
        da = data.prepare_camera_map(da, camera)
    return da, sha, name


def open_map(
    source: str | os.PathLike | xr.DataArray,
    *,
    model: str = "two",
    load: LoadOptions | Mapping[str, Any] | None = None,
) -> MapInput:
    """Load and validate a map and check the model and the kind of spectrum.

    Parameters
    ----------
    source, model
        The map and the model, as for :func:`~polkit.jobs.dispersion.run.fit_dispersion`.
    load
        A :class:`polkit.data.LoadOptions` (or a dict of its fields).  Read here:
        ``kind`` (``"emission"``, ``"reflectance"`` or ``"transmission"``; default from
        the map's attributes; transmission peaks follow the photon spectral function, so
        it is fitted with the emission model), ``wavelength_medium`` and the loader
        options (see :func:`polkit.load_map`), and ``camera``: a
        :class:`polkit.data.CameraOptions` that subtracts the camera offset before unit
        conversion and masks saturated pixels, cosmic-ray spikes and excluded windows
        (counted in ``data.attrs["preprocessing"]``); ``camera=None`` (the default here):
        none of these steps, while :func:`~polkit.jobs.dispersion.run.fit_dispersion`
        uses the default options.  The windows are not applied here
        (:meth:`MapInput.cropped`).

    Returns
    -------
    MapInput
        The map with dims (in-plane axis, energy), its hash and name, model and kind.

    Raises
    ------
    DataError
        Unknown model or kind, or a bad map (naming the file and the field).
    """
    from polkit.data import LoadOptions

    if model not in MODELS:
        raise DataError(f"expected model 'weak', 'two' or 'three', found {model!r}.",
                        field="model")
    load = LoadOptions.of(load)
    da, sha, source_name = _load(source, load)
    kind = load.kind or da.attrs.get("kind", "emission")
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
    return MapInput(da.transpose(in_plane_axis(da), "energy"), sha, source_name, model, kind_model)


# --------------------------------------------------------------------------------------
# the problem and where it starts
# --------------------------------------------------------------------------------------
@dataclass(frozen=True, eq=False)
class DispersionStart:
    """Where a dispersion fit starts (built by :func:`prepare_dispersion`).

    Attributes
    ----------
    source
        The map as fitted (cropped to the windows).
    table
        Its per-angle peak table.
    guess
        The automatic starting point from the peak table, ``{name: value}``.
    x0
        The starting vector inside the priors, in the order of the parameter space.
    """

    source: MapInput
    table: xr.Dataset
    guess: dict[str, float]
    x0: np.ndarray


def peak_start(
    da: xr.DataArray,
    *,
    n_excitons: int,
    kind: str,
    priors: str | os.PathLike | dict | None = None,
    profile: str = "lorentzian",
    coupling: str = "strong",
    min_snr: float = 5.0,
) -> tuple[xr.Dataset, dict[str, float], ParameterSpace]:
    """Peak table, automatic guess and parameter space of a map.

    Parameters
    ----------
    da
        The map (dims in-plane axis, energy).
    n_excitons
        Exciton oscillators of the model (the table looks for ``n_excitons + 1`` peaks).
    kind
        ``"emission"`` or ``"reflectance"`` (the reflectance model has a mirror share).
    priors
        TOML file or dict of priors over the defaults (keys: parameter names).
    profile
        Peak shape of the table, ``"lorentzian"`` or ``"voigt"``.
    coupling
        ``"strong"`` (coupled oscillators) or ``"weak"`` (uncoupled modes: no Rabi
        splitting among the parameters).
    min_snr
        Detection threshold of the peak table (see :func:`polkit.linefit.peak_table`).

    Returns
    -------
    tuple
        ``(table, guess, space)``: the priors come from the map's energy range and the
        guess, with the user's priors on top.
    """
    from polkit.linefit import peak_table

    # peak_table warns (DataWarning) when only one branch is visible: g and detuning degenerate
    table = peak_table(da, n_peaks=n_excitons + 1, profile=profile, min_snr=min_snr)
    guess = guess_from_peaks(table, n_excitons=n_excitons)
    space = default_space(da["energy"].values, guess, n_excitons=n_excitons, kind=kind,
                          coupling=coupling)
    if priors is not None:
        space = apply_priors(space, priors, path=priors if not isinstance(priors, dict) else None)
    return table, guess, space


def start_vector(space: ParameterSpace, guess: Mapping[str, float], *,
                 keep_inside: bool = False, log_margin: bool = False) -> np.ndarray:
    """The guess as a parameter vector strictly inside the priors.

    Parameters without a guess start at a noise scale of 1, a mirror share of 0.5, or
    the centre of their prior.  ``keep_inside`` and ``log_margin`` as in
    :func:`polkit.jobs.steps.clip_into`.
    """
    return np.array([
        clip_into(p, guess.get(p.name, _default_start(p.name)), keep_inside=keep_inside,
                  log_margin=log_margin)
        for p in space
    ])


def map_problem(source: MapInput, space: ParameterSpace, *,
                table: xr.Dataset | None = None) -> DispersionProblem:
    """The :class:`DispersionProblem` of a map, with its first noise model.

    The first noise model comes from the map alone
    (:func:`~polkit.jobs.dispersion.noise.noise_inverse_variance`);
    :func:`calibrate_problem_noise` replaces it at a mode.  ``table`` enables the
    peak-table likelihood.
    """
    da = source.data
    axis = source.axis
    inv_var, noise_note = noise_inverse_variance(da)
    return DispersionProblem(
        axis=axis,
        in_plane=da[axis].values.astype(float),
        energy=da["energy"].values.astype(float),
        y=np.asarray(da.values, dtype=float),
        inv_var=inv_var,
        space=space,
        n_excitons=source.n_excitons,
        kind=source.kind,
        table=table,
        noise_note=noise_note,
        coupling=source.coupling,
        # emission: a background linear in energy per angle (a camera offset per raw
        # wavelength pixel becomes, after the Jacobian lambda^2/hc, a slope in energy)
        background=EMISSION_BACKGROUND if source.kind == "emission" else "constant",
    )


# --------------------------------------------------------------------------------------
# modes and the noise model
# --------------------------------------------------------------------------------------
def table_mode(problem: DispersionProblem, x0: np.ndarray, *,
               table: xr.Dataset | None = None) -> MapResult:
    """The mode of the peak-table posterior, started at ``x0``.

    ``table`` replaces the problem's peak table (the problem itself is left unchanged).
    The peak-table posterior is smooth, so its mode is a safe start for the whole map.
    """
    if table is not None:
        problem = dataclasses.replace(problem, table=table)
    space = problem.space
    mode = find_map(LogPosterior(problem.table_log_likelihood, space), space, x0)
    log.info("peak-table mode: %s", dict(zip(space.names, np.round(mode.x, 6), strict=True)))
    return mode


def refine_mode(problem: DispersionProblem, x0: np.ndarray, *,
                staged: bool = False) -> MapResult:
    """The mode of the whole-map posterior, started at ``x0``.

    With ``staged`` the line-shape parameters are optimised first with the branch
    positions held (several starts of the mirror share for reflectance), then everything:
    the right start from a peak-table mode, which says little about line shapes.
    """
    space = problem.space
    if staged:
        return _staged_map(problem.log_likelihood, space, x0)
    return find_map(LogPosterior(problem.log_likelihood, space), space, x0)


def whole_map_start(problem: DispersionProblem, x0: np.ndarray,
                    table_x: np.ndarray | None = None) -> MapResult:
    """The whole-map mode from the better of two starts: the peak-table mode and the guess.

    The peak-table mode is usually the better start, but where the per-angle line fits
    place peaks poorly (lines that overlap, an uncoupled cavity mode crossing the exciton
    line) it can be far off; the raw guess from the table's peak positions is then the
    safer start.  Both are refined in stages (:func:`refine_mode`) and the one with the
    higher whole-map posterior is kept.  # common practice, no published source

    Parameters
    ----------
    problem
        The problem (with its peak table).
    x0
        The automatic guess (:attr:`DispersionStart.x0`).
    table_x
        The peak-table mode, when already found (else it is found here).
    """
    table_x = table_mode(problem, x0).x if table_x is None else table_x
    return max((refine_mode(problem, x, staged=True) for x in (table_x, x0)),
               key=lambda r: r.log_post)


def calibrate_problem_noise(problem: DispersionProblem, x: np.ndarray,
                            attrs: Mapping[str, Any] | xr.DataArray, *,
                            mask_outliers: bool = True) -> str:
    """Calibrate the noise model at ``x``, mask gross pixels and set it on ``problem``.

    The detector model (gain and read noise, :func:`~polkit.jobs.dispersion.noise.
    detector_terms`) is used for emission counts that carry them, also through a
    ``jacobian`` coordinate; otherwise the variance function fitted robustly to the
    residuals with the leverage of the per-angle linear columns (:func:`calibrate_noise`).
    With ``mask_outliers`` pixels whose standardised residual at ``x`` exceeds
    :func:`~polkit.jobs.dispersion.noise.outlier_cut` (the level a Gaussian pixel
    exceeds once in a hundred maps), and pixels at or above a declared saturation level, get
    inverse variance 0 (left out of the likelihood); the mask is recomputed from scratch at
    every call.  What was done is kept in ``problem.noise_calibration`` (a dict: ``outliers``,
    ``saturated``, ``cut``, ``mask``, ``source``).

    Parameters
    ----------
    problem
        The problem; its inverse variance and noise note are replaced.
    x
        The mode (parameter vector) whose residuals calibrate the model.
    attrs
        The map (a DataArray, whose ``jacobian`` coordinate is then seen) or its attributes
        (``units``, ``gain``, ``read_noise``, ``saturation``).
    mask_outliers
        Mask gross pixels (default); ``False`` keeps every finite pixel.

    Returns
    -------
    str
        A sentence on how the noise was set (the result's ``noise_model``).
    """
    from polkit.jobs.dispersion.noise import detector_terms, outlier_cut, outlier_mask

    sol = problem.model_map(x)
    model_map = np.asarray(sol.model).reshape(problem.y.shape)
    detector = detector_terms(attrs, problem.kind)
    design = np.moveaxis(np.asarray(problem.basis(x[None, :]))[0], 1, 2)  # (A, E, K)
    design = np.concatenate([design, np.ones(design.shape[:2] + (1,))], axis=2)
    plain = getattr(attrs, "attrs", attrs)
    gain = (plain.get("gain") if detector is None and problem.kind == "emission"
            and str(plain.get("units", "")).strip() == "counts" else None)
    inv_var, a, b = calibrate_noise(problem.y, model_map, design=design, detector=detector,
                                    gain=gain)
    how = ("CCD gain and read noise from the file" if detector is not None
           else "fitted robustly to the MAP residuals")
    note = (f"variance = a * model + b with a = {a:.4g}, b = {b:.4g} (squared signal units; "
            f"{how}), times noise_scale^2")
    mask = np.zeros(problem.y.shape, dtype=bool)
    saturated = np.zeros_like(mask)
    n_ok = int(np.count_nonzero(inv_var > 0))
    cut = outlier_cut(n_ok)
    if mask_outliers:
        if detector is not None:
            saturated = detector.saturated(problem.y)
            names = problem.space.names
            scale = float(x[names.index("noise_scale")]) if "noise_scale" in names else 1.0
        else:
            scale = 1.0
        mask = outlier_mask(problem.y, model_map, inv_var, scale, cut) & ~saturated
        inv_var = np.where(mask | saturated, 0.0, inv_var)
        n_out, n_sat = int(mask.sum()), int(saturated.sum())
        if n_out or n_sat:
            note += (f"; {n_out} outlier pixel(s) beyond {cut:.2f} sigma"
                     + (f" and {n_sat} saturated pixel(s)" if n_sat else "")
                     + " left out")
            log.info("noise model: %d outlier and %d saturated pixels masked", n_out, n_sat)
    problem.set_noise(inv_var, note)
    problem.noise_calibration = {
        "outliers": int(mask.sum()), "saturated": int(saturated.sum()), "cut": float(cut),
        "mask": mask | saturated,
        "source": "detector model" if detector is not None else "fitted to the residuals",
    }
    return note


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


def _default_start(name: str) -> float:
    if name == "noise_scale":
        return 1.0
    if name == "mirror_fraction":
        return 0.5
    return float("nan")
