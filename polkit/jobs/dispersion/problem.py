"""The dispersion problem: parameter vector -> physics, the likelihoods, derived quantities.

The physics lives in :mod:`polkit.models.dispersion` and :mod:`polkit.models.spectral`;
this module says how a vector of the sampled parameters maps onto the physics, the two
likelihoods (whole map and peak table) and the quantities derived per posterior draw.

The sampled parameters and their default priors are in
:mod:`polkit.jobs.dispersion.parameters`; the first noise model in
:mod:`polkit.jobs.dispersion.noise`.

Amplitudes (branch occupations per angle, reflectance scale) and backgrounds are not
sampled: they are solved by variable projection per angle for every walker.
"""

from __future__ import annotations

from collections.abc import Mapping
from dataclasses import dataclass, field

import numpy as np
import xarray as xr

from polkit.errors import DataError, FitError
from polkit.inference.priors import ParameterSpace
from polkit.models import dispersion as disp
from polkit.models import spectral
from polkit.models.bare_modes import bare_mode_basis
from polkit.numerics import kernels as _kernels
from polkit.numerics import projection
from polkit.numerics import table_kernels as _table_kernels

__all__ = [
    "MODELS",
    "COUPLED_MODELS",
    "DispersionProblem",
    "in_plane_axis",
    "table_arrays",
    "fitted_line_centre",
    "table_centre_response",
    "line_maximum",
]

MEV = 1e-3
#: model name -> number of exciton resonances ("weak": the uncoupled modes, g = 0)
MODELS = {"weak": 1, "two": 1, "three": 2}
#: the coupled-oscillator models (those with a Rabi splitting)
COUPLED_MODELS = ("two", "three")


def in_plane_axis(da: xr.DataArray) -> str:
    """The in-plane dimension of a canonical map or peak table: ``angle`` or ``k``."""
    for name in ("angle", "k"):
        if name in da.dims:
            return name
    raise DataError(
        f"expected an 'angle' or 'k' dimension, found dims {tuple(da.dims)}.",
        path=da.attrs.get("source"),
        field="dims",
    )


# --------------------------------------------------------------------------------------
# the peak table as arrays
# --------------------------------------------------------------------------------------
def table_arrays(table: xr.Dataset):
    """``(axis, in_plane, energy, energy_error, fwhm, fwhm_error, found)`` of a peak table.

    Energies in eV, widths converted from meV to eV, arrays ``(A, P)`` with the in-plane
    axis first; ``found`` marks peaks with a finite energy and a positive error.
    """
    axis = in_plane_axis(table)
    x = np.asarray(table[axis].values, dtype=float)
    e = np.asarray(table["energy"].transpose(axis, ...).values, dtype=float)
    de = np.asarray(table["energy_error"].transpose(axis, ...).values, dtype=float)
    w = np.asarray(table["fwhm"].transpose(axis, ...).values, dtype=float) * MEV
    dw = np.asarray(table["fwhm_error"].transpose(axis, ...).values, dtype=float) * MEV
    found = np.isfinite(e) & np.isfinite(de) & (de > 0)
    return axis, x, e, de, w, dw, found


# --------------------------------------------------------------------------------------
# the problem: theta -> physics, likelihoods, derived quantities
# --------------------------------------------------------------------------------------
@dataclass
class DispersionProblem:
    """One coupled-oscillator fit of one map: data, parameter space and likelihoods.

    ``log_likelihood(theta)`` evaluates the whole-map likelihood for a whole ensemble
    ``theta`` of shape ``(W, P)`` in one vectorised call; ``table_log_likelihood`` does
    the same for the peak-table path.
    """

    axis: str
    in_plane: np.ndarray
    energy: np.ndarray
    y: np.ndarray
    inv_var: np.ndarray
    space: ParameterSpace
    n_excitons: int = 1
    kind: str = "emission"
    table: xr.Dataset | None = None
    background: str = "constant"
    noise_note: str = ""
    coupling: str = "strong"
    _n_pixels: int = field(init=False, default=0)

    def __post_init__(self):
        if self.coupling not in ("strong", "weak") or (
                self.coupling == "weak" and self.n_excitons != 1):
            raise FitError(f"expected coupling 'strong', or 'weak' with one exciton; found "
                           f"{self.coupling!r} with {self.n_excitons} excitons.")
        self.set_noise(self.inv_var, self.noise_note)
        self._idx = {n: i for i, n in enumerate(self.space.names)}
        self._wm_two_mode = None
        if self.table is not None:
            (_, _, self._te, self._tde, self._tw, self._tdw, self._tfound) = table_arrays(
                self.table
            )
            self._t_all = self._tfound.sum(axis=1) == (self.n_excitons + 1)
            self._t_resp = None
            if self.kind == "emission":
                self._t_resp = table_centre_response(self.table, self.energy, self.inv_var)
            # the table side of the likelihood, fixed for the fit: (A, P) arrays for the
            # compiled kernel, (1, A, P, 1) views of them for the numpy path (entries of
            # peaks not found are placeholders: 0 eV, error 1 eV; they are never summed)
            w_ok = np.isfinite(self._tw) & np.isfinite(self._tdw) & (self._tdw > 0)
            own = (None if self._t_resp is None else
                   np.diagonal(self._t_resp, axis1=1, axis2=2))
            resp = None if self._t_resp is None else np.ascontiguousarray(self._t_resp)
            self._t_kernel = tuple(
                a if a is None else np.ascontiguousarray(a)
                for a in (np.nan_to_num(self._te), np.where(self._tfound, self._tde, 1.0),
                          np.where(w_ok, self._tw, 0.0),
                          np.where(w_ok, self._tdw, 1.0), w_ok, own, resp, self._t_all,
                          self._tfound)
            )
            t_e, t_de, t_wr, t_wd = self._t_kernel[:4]
            self._t_e = t_e[None, :, :, None]
            self._t_de = t_de[None, :, :, None]
            self._t_w_ok = self._t_kernel[4][None, :, :, None]
            self._t_wr = t_wr[None, :, :, None]
            self._t_wd = t_wd[None, :, :, None]
            self._t_own = None if own is None else self._t_kernel[5][None, :, :, None]
            self._t_nobs = int(self._tfound.sum() + (self._tfound & w_ok).sum())
            self._t_fused = self._t_operands = None
            if _kernels.available():  # the table side in the kernels' form, once per fit
                self._t_operands = _table_kernels.table_operands(*self._t_kernel)
                if self.n_excitons == 1:
                    self._t_fused = self._two_mode_operands()

    def _two_mode_operands(self) -> tuple:
        """What the one-exciton compiled peak-table kernel needs, fixed for the fit.

        The parameter map mirrors :meth:`physics` (levels in eV, Rabi splitting in meV ->
        ``g = 0.5 * 1e-3 * rabi`` eV, linewidths in meV -> eV; no Rabi column: ``g = 0``),
        the axis terms ``sin^2(angle)`` or ``hbar c k`` and the table side.
        """
        return (*self._two_mode_map(), self._t_operands)

    def _two_mode_map(self) -> tuple:
        """How the one-exciton kernels read the physics from ``theta``, and the axis terms."""
        idx = self._idx
        rabi = idx.get("rabi_splitting", -1)
        parameters = _table_kernels.parameter_map(
            [idx["cavity_energy"], idx["n_eff"], idx["exciton_energy"], rabi,
             idx["cavity_linewidth"], idx["exciton_linewidth"]],
            [1.0, 1.0, 1.0, 0.5 * MEV, MEV, MEV], len(self.space.names))
        return parameters, _table_kernels.in_plane_terms(self.in_plane, self.axis)

    def set_noise(self, inv_var: np.ndarray, note: str = "") -> None:
        """Set the inverse variance per pixel and precompute the data side of the projection."""
        self.inv_var = np.asarray(inv_var, dtype=float)
        self.noise_note = note
        self._n_pixels = int(np.count_nonzero(self.inv_var > 0))
        # degrees of freedom left after the linear columns solved per angle (branch
        # amplitudes or reflectance scale, plus the background): integrating those linear
        # parameters out under flat priors turns -N log(s) into -(N - K) log(s)
        # (Gelman et al., Bayesian Data Analysis, 3rd ed., section 14.2)
        n_columns = self.n_linear_columns + (
            {"constant": 1, "linear": 2}.get(self.background, 0))
        active = int(np.count_nonzero((self.inv_var > 0).any(axis=1)))
        self._n_dof = max(self._n_pixels - active * n_columns, 1)
        self._weighted = projection.prepare_map(
            self.y, self.inv_var, background=self.background, energy_ev=self.energy
        )

    @property
    def n_linear_columns(self) -> int:
        """Basis amplitudes solved per angle (the background columns not counted)."""
        if self.coupling == "weak":
            return 2
        return 1 if self.kind == "reflectance" else self.n_excitons + 1

    @property
    def n_background_columns(self) -> int:
        """Background coefficients solved per angle."""
        return {"constant": 1, "linear": 2}.get(self.background, 0)

    # -- mapping ------------------------------------------------------------------
    def physics(self, theta: np.ndarray) -> dict:
        """Keyword arguments for :mod:`polkit.models.spectral`, all in eV, batch ``(W,)``."""
        t = np.atleast_2d(np.asarray(theta, dtype=float))
        c = {n: t[:, i] for n, i in self._idx.items()}
        p = {
            "e_c0": c["cavity_energy"],
            "n_eff": c["n_eff"],
            "gamma_c": c["cavity_linewidth"] * MEV,
            "axis": self.axis,
        }
        if self.n_excitons == 1:
            p.update(
                e_x=c["exciton_energy"],
                g=0.5 * self._rabi(c) * MEV,
                gamma_x=c["exciton_linewidth"] * MEV,
            )
        else:
            p.update(
                e_x=[c["exciton_energy"], c["exciton2_energy"]],
                g=[0.5 * c["rabi_splitting"] * MEV, 0.5 * c["rabi_splitting2"] * MEV],
                gamma_x=[c["exciton_linewidth"] * MEV, c["exciton2_linewidth"] * MEV],
            )
        return p

    @staticmethod
    def _rabi(c: Mapping[str, np.ndarray]) -> np.ndarray:
        """The Rabi splitting column (meV), zero for the uncoupled-modes model."""
        if "rabi_splitting" in c:
            return c["rabi_splitting"]
        return np.zeros_like(c["exciton_energy"])

    def _noise_scale(self, theta: np.ndarray) -> np.ndarray:
        if "noise_scale" in self._idx:
            return theta[:, self._idx["noise_scale"]]
        return np.ones(theta.shape[0])

    # -- whole map ----------------------------------------------------------------
    def basis(self, theta: np.ndarray):
        if self._whole_map_compiled():
            basis = self._compiled_basis(np.atleast_2d(np.asarray(theta, dtype=float)))
            if basis is not None:
                return basis
        p = self.physics(theta)
        kappa = None
        if self.kind == "reflectance":
            t = np.atleast_2d(theta)
            kappa = t[:, self._idx["mirror_fraction"]] * t[:, self._idx["cavity_linewidth"]] * MEV
        if self.coupling == "weak":
            return bare_mode_basis(self.in_plane, self.energy, e_c0=p["e_c0"], n_eff=p["n_eff"],
                                   e_x=p["e_x"], gamma_c=p["gamma_c"], gamma_x=p["gamma_x"],
                                   kappa=kappa, axis=self.axis)
        if kappa is not None:
            return spectral.reflectance_basis(self.in_plane, self.energy, kappa=kappa, **p)
        return spectral.emission_basis(self.in_plane, self.energy, **p)

    def _whole_map_compiled(self) -> bool:
        """True if the emission basis of one strongly coupled exciton takes compiled poles."""
        return (self.kind != "reflectance" and self.coupling != "weak"
                and self.n_excitons == 1 and _kernels.enabled())

    def _compiled_basis(self, theta: np.ndarray):
        """The emission basis from the compiled one-exciton poles, or None outside the domain.

        :func:`polkit.numerics.table_kernels.two_mode_poles` computes the cavity energy, the
        closed-form poles and the photon residues of :func:`polkit.models.spectral.branch_poles`
        in one call (the same formulas; agreement to rounding is tested).  A walker outside
        the model's domain (``g < 0``, a level or width ``<= 0``, ``n_eff <= max |sin|``, or
        NaN) returns None, so the numpy path runs and names the offending parameter.
        """
        if self._wm_two_mode is None:  # once per fit: the map and the physics' columns
            parameters, axis_terms = self._two_mode_map()
            columns, scales, _ = parameters
            self._wm_two_mode = (parameters, axis_terms, np.maximum(columns, 0),
                                 np.where(columns >= 0, scales, 0.0))
        parameters, axis_terms, gather, factors = self._wm_two_mode
        e_c0, n_eff, e_x, g, gamma_c, gamma_x = (theta[:, gather] * factors).T
        with np.errstate(invalid="ignore"):
            inside = ((e_c0 > 0) & (n_eff > axis_terms[2]) & (e_x > 0) & (g >= 0)
                      & (gamma_c > 0) & (gamma_x > 0))
        if not inside.all():
            return None
        poles, residues = _table_kernels.two_mode_poles(theta, parameters, axis_terms)
        return spectral.emission_basis_from_poles(poles, residues, self.energy)

    def log_likelihood(self, theta: np.ndarray) -> np.ndarray:
        """Whole-map Gaussian log-likelihood (up to a constant), shape ``(W,)``.

        ``-chi2 / (2 s^2) - (N - K) log s`` with ``chi2`` minimised over the linear
        amplitudes and backgrounds per angle, ``s`` the noise scale, ``N`` the unmasked
        pixels and ``K`` the linear coefficients solved (their flat-prior marginal).
        """
        theta = np.atleast_2d(theta)
        chi2 = projection.project_linear(self._weighted, None, self.basis(theta), nonneg=True)
        s = self._noise_scale(theta)
        return -0.5 * chi2 / (s * s) - self._n_dof * np.log(s)

    def model_map(self, theta: np.ndarray):
        """Best-fit map and its parts for one parameter vector (a LinearSolution)."""
        theta = np.atleast_2d(theta)[:1]
        sol = projection.project_linear(
            self._weighted, None, self.basis(theta), nonneg=True, return_parts=True
        )
        return sol

    # -- peak table ---------------------------------------------------------------
    def table_log_likelihood(self, theta: np.ndarray) -> np.ndarray:
        """Gaussian log-likelihood of the peak table (positions and widths), shape ``(W,)``.

        Where every branch is found at an angle, peaks are matched to branches in energy
        order; elsewhere each found peak is matched to the branch that explains it best.
        A table peak position is compared with :func:`fitted_line_centre` (where a
        symmetric line fit places an asymmetric branch line), its width with the branch
        FWHM ``-2 Im eps``.

        Routes: with the compiled kernels on, one exciton goes from ``theta`` to the
        chi-square in one call (:func:`polkit.numerics.table_kernels.two_mode_table_chi2`); a walker
        outside the model's domain sends the call to the numpy poles, which raise the
        ``DataError``.  Three oscillators take the numpy poles and the compiled matching
        (:func:`polkit.numerics.table_kernels.table_chi2`); without numba (or with
        ``POLKIT_COMPILED=0``) everything is numpy.
        """
        if self.table is None:
            raise FitError("no peak table was given to this problem.")
        theta = np.atleast_2d(theta)
        chi2 = None
        compiled = _kernels.enabled()
        if compiled and self._t_fused is not None:  # one exciton: one compiled call
            chi2, outside = _table_kernels.two_mode_table_chi2(theta, *self._t_fused)
            if outside:  # the numpy route below raises the DataError naming the parameter
                chi2 = None
        if chi2 is None:
            p = self.physics(theta)
            poles, res = spectral.branch_poles(
                self.in_plane, **{k: v for k, v in p.items() if k != "axis"}, axis=self.axis
            )
            h = -poles.imag
            ratio = np.divide(res.imag, res.real, out=np.zeros_like(h), where=res.real > 0)
            if compiled:
                chi2 = _table_kernels.table_chi2_prepared(poles.real, h, ratio, self._t_operands)
            else:
                chi2 = self._table_chi2_numpy(poles, h, ratio)
        s = self._noise_scale(theta)
        n_obs = self._t_nobs
        return -0.5 * chi2 / (s * s) - n_obs * np.log(s)

    def _table_chi2_numpy(self, poles: np.ndarray, h: np.ndarray,
                          ratio: np.ndarray) -> np.ndarray:
        """Peak-table chi-square per walker in numpy (the path without numba).

        ``poles`` are the complex branch energies ``(W, A, K)``, ``h = -Im poles`` and
        ``ratio = Im r / Re r`` of the photon residues (0 where ``Re r <= 0``).
        """
        wid = (2.0 * h)[:, :, None, :]
        e, de = self._t_e, self._t_de
        r2w = np.where(self._t_w_ok, ((self._t_wr - wid) / self._t_wd) ** 2, 0.0)  # (W,A,P,K)
        resp = self._t_resp
        if resp is None:  # first order, uniform weights (fitted_line_centre)
            pos = (poles.real - h * ratio)[:, :, None, :]
        else:  # each peak's own response to the asymmetry of the branch it is matched to
            pos = poles.real[:, :, None, :] + self._t_own * ratio[:, :, None, :]
        r2 = ((e - pos) / de) ** 2 + r2w
        n_peaks, k = r2.shape[2], r2.shape[3]
        best = np.min(r2, axis=3)  # (W, A, P)
        if n_peaks == k:
            if resp is None:
                ordered = np.diagonal(r2, axis1=2, axis2=3)
            else:  # every branch found: the joint response, neighbours' asymmetry included
                pos_o = poles.real + np.einsum("apk,wak->wap", resp, ratio)
                ordered = ((e[..., 0] - pos_o) / de[..., 0]) ** 2 + np.diagonal(
                    r2w, axis1=2, axis2=3)
            best = np.where(self._t_all[None, :, None], ordered, best)
        return np.sum(np.where(self._tfound[None], best, 0.0), axis=(1, 2))

    # -- derived quantities ---------------------------------------------------------
    def derived(self, draws: np.ndarray) -> dict[str, tuple[np.ndarray, str, str]]:
        """Quantities derived per posterior draw: ``name -> (values, units, long_name)``.

        ``draws`` has shape ``(..., P)``; every output has the leading shape.
        """
        draws = np.asarray(draws, dtype=float)
        shape = draws.shape[:-1]
        t = draws.reshape(-1, draws.shape[-1])
        c = {n: t[:, i] for n, i in self._idx.items()}
        ex, ec0, n = c["exciton_energy"], c["cavity_energy"], c["n_eff"]
        rabi = self._rabi(c)
        g = 0.5 * rabi * MEV
        gc, gx = c["cavity_linewidth"], c["exciton_linewidth"]
        out: dict[str, tuple[np.ndarray, str, str]] = {}
        out["detuning"] = ((ec0 - ex) / MEV, "meV", "detuning E_C0 - E_X")
        p = self.physics(t)
        modes = disp.coupled_modes(ec0, p["e_x"], p["g"], p["gamma_c"], p["gamma_x"])
        lp = modes.energies[..., 0]
        if self.n_excitons == 1:
            x2, c2 = disp.hopfield_fractions(ec0, ex, g)
        else:
            c2 = modes.photon_fraction[..., 0]
            x2 = 1.0 - c2
        out["photon_fraction_k0"] = (c2, "1", "lower-polariton photon fraction |C|^2 at k = 0")
        out["exciton_fraction_k0"] = (x2, "1", "lower-polariton exciton fraction |X|^2 at k = 0")
        out["lp_energy_k0"] = (lp.real, "eV", "lower-polariton energy at k = 0")
        out["lp_linewidth_k0"] = (
            -2.0 * lp.imag / MEV,
            "meV",
            "lower-polariton linewidth at k = 0 (FWHM)",
        )
        m_c = disp.photon_mass(ec0, n)
        with np.errstate(divide="ignore", invalid="ignore"):
            m_lp = 1.0 / (c2 / m_c + x2 / disp.DEFAULT_EXCITON_MASS_ME)
        out["lp_effective_mass"] = (m_lp, "m_e", "lower-polariton effective mass at k = 0")
        out["cavity_photon_mass"] = (m_c, "m_e", "cavity photon mass E_C0 n_eff^2 / c^2")
        out["cavity_lifetime"] = (
            disp.lifetime_ps(gc),
            "ps",
            "cavity photon lifetime hbar / gamma_C",
        )
        out["lp_lifetime_k0"] = (
            disp.lifetime_ps(-2.0 * lp.imag / MEV),
            "ps",
            "lower-polariton lifetime at k = 0",
        )
        out["quality_factor"] = (
            disp.quality_factor(ec0, gc),
            "1",
            "cavity quality factor E_C0 / gamma_C",
        )
        strong = (rabi > 0.5 * (gc + gx)).astype(float)
        if "mirror_fraction" in c:
            out["mirror_coupling"] = (
                c["mirror_fraction"] * gc,
                "meV",
                "top-mirror coupling kappa (FWHM convention)",
            )
        out["strong_coupling"] = (
            strong,
            "1",
            "indicator 2g > (gamma_C + gamma_X)/2; its mean is the probability",
        )
        return {k: (np.reshape(v, shape), u, ln) for k, (v, u, ln) in out.items()}

    def branch_curves(self, draws: np.ndarray, grid: np.ndarray | None = None):
        """Branch and bare-mode energies along the in-plane axis for a set of draws.

        Returns ``(grid, branches (N, A, K), cavity (N, A), excitons (N, n_excitons))`` in eV.
        """
        grid = self.in_plane if grid is None else np.asarray(grid, dtype=float)
        t = np.atleast_2d(draws)
        p = self.physics(t)
        poles, _ = spectral.branch_poles(
            grid, **{k: v for k, v in p.items() if k != "axis"}, axis=self.axis
        )
        kw = {"angle_deg": grid} if self.axis == "angle" else {"k": grid}
        cav = disp.cavity_energy(p["e_c0"][:, None], p["n_eff"][:, None], **kw)
        exs = np.stack(
            [
                np.broadcast_to(e, (t.shape[0],))
                for e in (p["e_x"] if isinstance(p["e_x"], list) else [p["e_x"]])
            ],
            axis=-1,
        )
        return grid, poles.real, cav, exs


def table_centre_response(table: xr.Dataset, energy: np.ndarray,
                          inv_var: np.ndarray) -> np.ndarray | None:
    """How the centres of a per-angle Lorentzian fit respond to asymmetric branch lines.

    A branch line of area ``A`` is ``A (h - beta x) / (pi (x^2 + h^2))`` with ``beta = b/a``
    the ratio of the imaginary to the real part of its photon residue.  A weighted
    least-squares fit of symmetric Lorentzians plus a constant (what
    :func:`polkit.linefit.peak_table` does) responds to the odd parts linearly, to first
    order in ``beta``: ``d p = (J^T W J)^-1 J^T W sum_k beta_k o_k`` with ``J`` the fit's
    Jacobian at the table's own parameters, ``W`` the pixel weights and
    ``o_k = -A_k x / (pi (x^2 + h_k^2))`` (the Gauss-Newton step of the perturbed fit,
    e.g. Bjorck, Numerical Methods for Least Squares Problems, 1996, section 1.4).  The
    centre rows give ``R[a, j, k]``, the shift of peak ``j``'s centre per unit ``beta_k``
    (eV).  For one line, uniform weights and a wide window ``R = -h``
    (:func:`fitted_line_centre`); shot-noise weights and a neighbouring line change it,
    which is what this corrects.

    Parameters
    ----------
    table
        A Lorentzian peak table (``energy`` eV, ``fwhm`` meV, ``area`` signal x meV,
        ``background``).
    energy, inv_var
        The map's energy axis (eV) and inverse pixel variances ``(A, E)``.

    Returns
    -------
    ndarray or None
        ``R`` of shape ``(A, P, P)`` (zero rows and columns for peaks not found), or None
        when the table lacks what is needed (a Voigt table, no areas).
    """
    need = ("energy", "fwhm", "area", "found")
    if table.attrs.get("profile", "lorentzian") != "lorentzian" or any(
            n not in table for n in need):
        return None
    axis = in_plane_axis(table)
    x_c = np.asarray(table["energy"].transpose(axis, ...).values, dtype=float)
    h_all = 0.5 * MEV * np.asarray(table["fwhm"].transpose(axis, ...).values, dtype=float)
    area = MEV * np.asarray(table["area"].transpose(axis, ...).values, dtype=float)
    found = np.asarray(table["found"].transpose(axis, ...).values) > 0
    n_a, n_p = x_c.shape
    if inv_var.shape[0] != n_a:
        return None
    out = np.zeros((n_a, n_p, n_p))
    for a in range(n_a):
        ok = found[a] & np.isfinite(x_c[a]) & np.isfinite(h_all[a]) & np.isfinite(area[a]) & (
            h_all[a] > 0)
        idx = np.flatnonzero(ok)
        w = inv_var[a]
        if idx.size == 0 or np.count_nonzero(w > 0) < 3 * idx.size + 2:
            continue
        u = energy[None, :] - x_c[a, idx, None]  # (k, E)
        h = h_all[a, idx, None]
        d = u * u + h * h
        phi = h / (np.pi * d)
        cols = [np.ones_like(energy)]
        for j in range(idx.size):
            a_j = area[a, idx[j]]
            cols += [a_j * 2.0 * u[j] * h[j] / (np.pi * d[j] ** 2),  # d/d centre
                     a_j * 0.5 * (u[j] ** 2 - h[j] ** 2) / (np.pi * d[j] ** 2) * 2.0,  # d/d h
                     phi[j]]  # d/d area
        jac = np.stack(cols, axis=1)  # (E, 1 + 3k)
        odd = -area[a, idx, None] * u / (np.pi * d)  # (k, E)
        sw = np.sqrt(np.clip(w, 0.0, None))
        try:
            step, *_ = np.linalg.lstsq(jac * sw[:, None], (odd * sw[None, :]).T, rcond=None)
        except np.linalg.LinAlgError:
            continue
        centre_rows = 1 + 3 * np.arange(idx.size)
        out[a][np.ix_(idx, idx)] = step[centre_rows, :]
    return out


def fitted_line_centre(poles: np.ndarray, residues: np.ndarray) -> np.ndarray:
    """Centre that a least-squares fit of a symmetric Lorentzian gives for a branch line.

    A branch line ``-Im(r / (E - eps)) / pi`` with ``eps = E0 - i h`` and ``r = a + i b``
    is ``(a h - b x) / (pi (x^2 + h^2))``, ``x = E - E0``: a Lorentzian of area ``a`` plus
    an odd part.  To first order in ``b / a`` the odd part projects onto the derivative of
    the Lorentzian with respect to its centre only, which moves the fitted centre to
    ``E0 - h b / a``: twice the shift of the line's maximum (:func:`line_maximum`), and the
    fitted width stays ``2 h``.  (Projection: ``<odd, dL> / <dL, dL>`` with
    ``int x^2 / (x^2 + h^2)^3 dx = pi / (8 h^3)`` and ``int x^2 / (x^2 + h^2)^4 dx =
    pi / (16 h^5)``, any table of integrals; checked against scipy.optimize.curve_fit in
    the tests.)  Per-angle peak tables come from such fits, so the peak-table likelihood
    compares with this centre.  Uniform weights over a wide window are assumed; shot-noise
    weights and a neighbouring line move it further (the remaining peak-table bias).
    """
    h = -poles.imag
    a, b = residues.real, residues.imag
    shift = np.divide(-h * b, a, out=np.zeros_like(h), where=a > 0)
    return poles.real + shift


def line_maximum(poles: np.ndarray, residues: np.ndarray) -> np.ndarray:
    """Energy of the maximum of a branch line ``-Im(r / (E - eps)) / pi``.

    With ``eps = E0 - i h`` and ``r = a + i b`` the line is ``(a h - b x) / (pi (x^2 + h^2))``,
    ``x = E - E0``, whose maximum lies at ``x = -h b / (a + |r|)`` (set the derivative to
    zero; the root that tends to 0 as ``b -> 0``).  A complex residue (unequal linewidths
    of the coupled modes) makes the line slightly asymmetric and moves its maximum away
    from ``Re eps``; a peak table measures the maximum, so the peak-table likelihood
    compares with this.  # derivation above; no published source needed
    """
    h = -poles.imag
    a, b = residues.real, residues.imag
    denom = a + np.abs(residues)
    shift = np.divide(-h * b, denom, out=np.zeros_like(h), where=denom > 0)
    return poles.real + shift
