"""The detuning surface of a wafer: a low-order polynomial in the position, fitted by
weighted least squares, with its gradient and the zero-detuning line and band."""

from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import xarray as xr

from polkit.errors import ConfigError, FitError

__all__ = ["SurfaceFit", "fit_surface", "surface_from_dataset", "SURFACE_TERMS"]

SURFACE_TERMS = {1: ("1", "x", "y"), 2: ("1", "x", "y", "x^2", "x*y", "y^2")}


def _design(x: np.ndarray, y: np.ndarray, degree: int) -> np.ndarray:
    cols = [np.ones_like(x), x, y]
    if degree == 2:
        cols += [x * x, x * y, y * y]
    return np.stack(cols, axis=-1)


@dataclass
class SurfaceFit:
    """A low-order polynomial surface ``v(x, y)`` fitted by weighted least squares.

    ``v = c0 + c1 u + c2 w [+ c3 u^2 + c4 u w + c5 w^2]`` with ``u = x - x0``,
    ``w = y - y0`` (mm) about the centroid ``(x0, y0)`` of the positions used, so ``c1``
    and ``c2`` are the gradient at the centroid for either degree.

    Attributes
    ----------
    degree
        1 (plane) or 2 (quadric).
    terms
        Names of the coefficients (``"1"``, ``"x"``, ``"y"``, ``"x^2"``, ``"x*y"``,
        ``"y^2"``).
    coefficients, covariance
        Fitted coefficients and their covariance (scaled, see ``scale_factor``).
    centre_mm
        ``(x0, y0)``.
    units, length_units
        Units of ``v`` (e.g. ``"meV"``) and of positions (``"mm"``).
    chi2, dof
        Weighted residual sum of squares and degrees of freedom.
    scale_factor
        ``max(1, sqrt(chi2 / dof))``; the covariance of the weights alone is multiplied
        by its square, so scatter beyond the per-position intervals (the wafer is not
        exactly a polynomial) widens the intervals instead of being ignored.
    x_mm, y_mm, values, sigmas, positions
        The points fitted.
    confidence
        Level of the reported intervals and of the zero-line band.
    quantity
        Name of the fitted quantity.
    """

    degree: int
    terms: tuple[str, ...]
    coefficients: np.ndarray
    covariance: np.ndarray
    centre_mm: tuple[float, float]
    units: str
    length_units: str
    chi2: float
    dof: int
    scale_factor: float
    x_mm: np.ndarray
    y_mm: np.ndarray
    values: np.ndarray
    sigmas: np.ndarray
    positions: list[str] = field(default_factory=list)
    confidence: float = 0.95
    quantity: str = "detuning"

    @property
    def z(self) -> float:
        """Two-sided normal quantile of ``confidence`` (1.96 for 95 %)."""
        from scipy.stats import norm

        return float(norm.ppf(0.5 + 0.5 * self.confidence))

    def evaluate(self, x, y) -> tuple[np.ndarray, np.ndarray]:
        """Surface mean and its standard error at positions ``x``, ``y`` (mm).

        The standard error is ``sqrt(a^T C a)`` with ``a`` the row of the design matrix
        (linear propagation of the coefficient covariance).
        """
        x = np.asarray(x, dtype=float)
        y = np.asarray(y, dtype=float)
        a = _design(x - self.centre_mm[0], y - self.centre_mm[1], self.degree)
        mean = a @ self.coefficients
        var = np.einsum("...i,ij,...j->...", a, self.covariance, a)
        return mean, np.sqrt(np.clip(var, 0.0, None))

    def gradient(self, x=None, y=None) -> tuple[np.ndarray, np.ndarray]:
        """Gradient ``(dv/dx, dv/dy)`` in units per mm and its 2 x 2 covariance.

        At the centroid by default (where it is ``(c1, c2)`` for either degree).
        """
        u = 0.0 if x is None else float(x) - self.centre_mm[0]
        w = 0.0 if y is None else float(y) - self.centre_mm[1]
        jac = np.zeros((2, len(self.terms)))
        jac[0, 1] = jac[1, 2] = 1.0
        if self.degree == 2:
            jac[0, 3], jac[0, 4] = 2.0 * u, w
            jac[1, 4], jac[1, 5] = u, 2.0 * w
        return jac @ self.coefficients, jac @ self.covariance @ jac.T

    def gradient_summary(self) -> dict[str, Any]:
        """Gradient at the centroid: components, magnitude and direction with uncertainties.

        Magnitude and direction (degree, counter-clockwise from +x, pointing to increasing
        values) are propagated linearly from the component covariance.
        """
        g, cov = self.gradient()
        mag = float(np.hypot(*g))
        unit = f"{self.units}/{self.length_units}"
        out: dict[str, Any] = {"at_mm": list(self.centre_mm), "units": unit,
                               "confidence": self.confidence}
        sx, sy = np.sqrt(np.clip(np.diag(cov), 0.0, None))
        out["x"] = {"value": float(g[0]), "sigma": float(sx), "units": unit}
        out["y"] = {"value": float(g[1]), "sigma": float(sy), "units": unit}
        if mag > 0:
            j_mag = g / mag
            j_dir = np.array([-g[1], g[0]]) / mag**2
            s_mag = float(np.sqrt(max(j_mag @ cov @ j_mag, 0.0)))
            s_dir = float(np.degrees(np.sqrt(max(j_dir @ cov @ j_dir, 0.0))))
        else:
            s_mag, s_dir = float(np.sqrt(np.trace(cov))), 180.0
        out["magnitude"] = {"value": mag, "sigma": s_mag, "units": unit}
        out["direction"] = {"value": float(np.degrees(np.arctan2(g[1], g[0]))),
                            "sigma": s_dir, "units": "degree"}
        for key in ("x", "y", "magnitude", "direction"):
            e = out[key]
            e["low"], e["high"] = e["value"] - self.z * e["sigma"], e["value"] + self.z * e["sigma"]
        return out

    def bounds(self, pad: float = 0.0) -> tuple[float, float, float, float]:
        """``(xmin, xmax, ymin, ymax)`` of the fitted positions, widened by ``pad`` mm."""
        return (float(self.x_mm.min()) - pad, float(self.x_mm.max()) + pad,
                float(self.y_mm.min()) - pad, float(self.y_mm.max()) + pad)

    def grid(self, n: int = 121, pad: float = 0.0):
        """Mean and standard error on an ``n x n`` grid over :meth:`bounds`: ``(X, Y, M, S)``."""
        x0, x1, y0, y1 = self.bounds(pad)
        if x1 <= x0:
            x0, x1 = x0 - 1.0, x1 + 1.0
        if y1 <= y0:
            y0, y1 = y0 - 1.0, y1 + 1.0
        xx, yy = np.meshgrid(np.linspace(x0, x1, n), np.linspace(y0, y1, n))
        mean, se = self.evaluate(xx, yy)
        return xx, yy, mean, se

    def level_line(self, level: float = 0.0, *, n: int = 121) -> list[dict[str, list[float]]]:
        """Where the surface equals ``level`` inside the measured area, with a band.

        Each segment holds points ``x``, ``y`` (mm) of the fitted line, the standard error
        of its position across the line ``sigma_mm = SE(v) / |grad v|`` (delta method),
        and the band edges ``x_low``/``y_low`` and ``x_high``/``y_high`` at
        ``confidence`` (``z * sigma_mm`` on either side, along the local gradient).
        """
        import contourpy

        xx, yy, mean, _ = self.grid(n)
        gen = contourpy.contour_generator(xx, yy, mean, line_type=contourpy.LineType.Separate)
        out = []
        for seg in gen.lines(level):
            if len(seg) < 2:
                continue
            px, py = seg[:, 0], seg[:, 1]
            _, se = self.evaluate(px, py)
            grads = np.array([self.gradient(a, b)[0] for a, b in zip(px, py, strict=True)])
            norm = np.hypot(grads[:, 0], grads[:, 1])
            with np.errstate(divide="ignore", invalid="ignore"):
                sigma = np.where(norm > 0, se / norm, np.inf)
                nx, ny = grads[:, 0] / norm, grads[:, 1] / norm
            out.append({
                "x": px.tolist(), "y": py.tolist(), "sigma_mm": sigma.tolist(),
                "x_low": (px - self.z * sigma * nx).tolist(),
                "y_low": (py - self.z * sigma * ny).tolist(),
                "x_high": (px + self.z * sigma * nx).tolist(),
                "y_high": (py + self.z * sigma * ny).tolist(),
            })
        return out

    def contains_level(self, x, y, level: float = 0.0) -> np.ndarray:
        """Whether ``level`` lies inside the pointwise ``confidence`` interval at ``(x, y)``.

        The zero-detuning band is the set of positions where this holds for ``level = 0``.
        """
        mean, se = self.evaluate(x, y)
        return np.abs(mean - level) <= self.z * se

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready description with units (written to ``surface.json``)."""
        coef_units = [self.units if t == "1" else
                      f"{self.units}/{self.length_units}" if t in ("x", "y") else
                      f"{self.units}/{self.length_units}^2" for t in self.terms]
        return {
            "quantity": self.quantity,
            "model": f"polynomial of degree {self.degree} in x, y about the centroid",
            "degree": self.degree,
            "units": self.units,
            "length_units": self.length_units,
            "centre_mm": list(self.centre_mm),
            "coefficients": [
                {"term": t, "value": float(c), "sigma": float(math.sqrt(max(v, 0.0))),
                 "units": u}
                for t, c, v, u in zip(self.terms, self.coefficients,
                                      np.diag(self.covariance), coef_units, strict=True)
            ],
            "covariance": self.covariance.tolist(),
            "chi2": self.chi2,
            "dof": self.dof,
            "scale_factor": self.scale_factor,
            "confidence": self.confidence,
            "n_positions": len(self.values),
            "positions": list(self.positions),
            "points": {"x_mm": self.x_mm.tolist(), "y_mm": self.y_mm.tolist(),
                       "values": self.values.tolist(), "sigmas": self.sigmas.tolist()},
            "gradient": self.gradient_summary(),
            "zero_line": self.level_line(0.0),
        }

    @classmethod
    def from_dict(cls, d: dict[str, Any]) -> SurfaceFit:
        """Rebuild from :meth:`to_dict`."""
        pts = d["points"]
        return cls(
            degree=int(d["degree"]),
            terms=tuple(c["term"] for c in d["coefficients"]),
            coefficients=np.array([c["value"] for c in d["coefficients"]], dtype=float),
            covariance=np.array(d["covariance"], dtype=float),
            centre_mm=tuple(d["centre_mm"]),
            units=d["units"],
            length_units=d["length_units"],
            chi2=float(d["chi2"]),
            dof=int(d["dof"]),
            scale_factor=float(d["scale_factor"]),
            x_mm=np.array(pts["x_mm"], dtype=float),
            y_mm=np.array(pts["y_mm"], dtype=float),
            values=np.array(pts["values"], dtype=float),
            sigmas=np.array(pts["sigmas"], dtype=float),
            positions=list(d.get("positions", [])),
            confidence=float(d.get("confidence", 0.95)),
            quantity=str(d.get("quantity", "detuning")),
        )


def fit_surface(
    x_mm,
    y_mm,
    values,
    sigmas,
    *,
    degree: int = 1,
    units: str = "meV",
    confidence: float = 0.95,
    positions: list[str] | None = None,
    quantity: str = "detuning",
) -> SurfaceFit:
    """Weighted least-squares fit of a polynomial surface of degree 1 or 2 in ``x``, ``y``.

    Weights are ``1 / sigma^2``.  The coefficient covariance is ``(A^T W A)^-1``, multiplied
    by ``chi2 / dof`` when that exceeds one (the scale-factor practice of the Particle
    Data Group's averages, value from memory), so an imperfect polynomial does not
    produce overconfident intervals.

    Parameters
    ----------
    x_mm, y_mm
        Positions (mm).
    values, sigmas
        Values and their standard uncertainties (e.g. half the 68 % interval).
    degree
        1 (plane, 3 coefficients) or 2 (quadric, 6 coefficients).
    units
        Units of ``values``.
    confidence
        Level of intervals and bands.
    positions
        Names of the points (kept for the record).
    quantity
        What is fitted (kept for the record).

    Returns
    -------
    SurfaceFit

    Raises
    ------
    FitError
        Too few points, positive uncertainties missing, or positions that do not span
        the surface (all on one line for degree 1).
    ConfigError
        A degree other than 1 or 2.
    """
    if degree not in SURFACE_TERMS:
        raise ConfigError(f"expected a surface degree of 1 or 2; found {degree!r}",
                          key="surface_degree")
    x, y, v, s, names = _surface_points(x_mm, y_mm, values, sigmas, degree, positions)
    centre, coef, cov, chi2, dof, scale = _weighted_fit(x, y, v, s, degree)
    return SurfaceFit(
        degree=degree,
        terms=SURFACE_TERMS[degree],
        coefficients=coef,
        covariance=cov * scale**2,
        centre_mm=centre,
        units=units,
        length_units="mm",
        chi2=chi2,
        dof=dof,
        scale_factor=scale,
        x_mm=x,
        y_mm=y,
        values=v,
        sigmas=s,
        positions=names,
        confidence=confidence,
        quantity=quantity,
    )


def _surface_points(x_mm, y_mm, values, sigmas, degree: int, positions: list[str] | None):
    """The points a surface is fitted to: finite, with a positive uncertainty, enough of them.

    Returns ``(x, y, values, sigmas, names)`` of the points kept.
    """
    x = np.asarray(x_mm, dtype=float).ravel()
    y = np.asarray(y_mm, dtype=float).ravel()
    v = np.asarray(values, dtype=float).ravel()
    s = np.asarray(sigmas, dtype=float).ravel()
    if not (x.size == y.size == v.size == s.size):
        raise FitError(f"x, y, values and sigmas differ in length ({x.size}, {y.size}, "
                       f"{v.size}, {s.size})")
    ok = np.isfinite(x) & np.isfinite(y) & np.isfinite(v) & np.isfinite(s) & (s > 0)
    n_terms = len(SURFACE_TERMS[degree])
    if ok.sum() < n_terms:
        raise FitError(
            f"a degree-{degree} surface needs at least {n_terms} positions with a finite value "
            f"and a positive uncertainty; found {int(ok.sum())}"
        )
    names = [p for p, k in zip(positions, ok, strict=True) if k] if positions else []
    return x[ok], y[ok], v[ok], s[ok], names


def _weighted_fit(x, y, v, s, degree: int):
    """Weighted least squares about the centroid.

    Returns ``(centre, coefficients, covariance of the weights alone, chi2, dof,
    scale factor)``.
    """
    n_terms = len(SURFACE_TERMS[degree])
    centre = (float(x.mean()), float(y.mean()))
    a = _design(x - centre[0], y - centre[1], degree)
    aw = a / s[:, None]
    vw = v / s
    if np.linalg.matrix_rank(aw) < n_terms:
        raise FitError(
            f"the {x.size} positions do not determine a degree-{degree} surface (they lie "
            "on a line or a conic); measure positions off that line or lower the degree"
        )
    coef, *_ = np.linalg.lstsq(aw, vw, rcond=None)
    cov = np.linalg.inv(aw.T @ aw)
    resid = vw - aw @ coef
    chi2 = float(resid @ resid)
    dof = int(x.size - n_terms)
    scale = math.sqrt(chi2 / dof) if dof > 0 and chi2 > dof else 1.0
    return centre, coef, cov, chi2, dof, scale


def surface_from_dataset(ds: xr.Dataset, degree: int) -> tuple[SurfaceFit | None, str]:
    """The detuning surface of an assembled survey from its converged positions.

    Each point is the posterior median with half the 68 % interval as its uncertainty.
    Returns ``(surface, "")``, or ``(None, why)`` when there is no surface to fit.
    """
    if "detuning" not in ds:
        return None, "no detuning in any result"
    ok = (ds["status"] == "ok").values
    q = ds["detuning"]
    median = q.sel(statistic="median").values
    sigma = 0.5 * (q.sel(statistic="q84").values - q.sel(statistic="q16").values)
    use = ok & np.isfinite(median) & np.isfinite(sigma) & np.isfinite(ds["x"].values)
    try:
        surf = fit_surface(
            ds["x"].values[use], ds["y"].values[use], median[use], sigma[use], degree=degree,
            units=str(q.attrs.get("units", "meV")),
            positions=[str(p) for p in ds["position"].values[use]],
        )
    except FitError as exc:
        return None, str(exc)
    return surf, ""

