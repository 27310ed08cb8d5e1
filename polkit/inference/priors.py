"""Parameters, their priors, and the ordered parameter space a fit samples.

A :class:`Prior` is one of four kinds, each written as a small dict (or a TOML
table) that always carries the parameter's units::

    {"prior": "uniform", "low": 5, "high": 20, "units": "meV"}
    {"prior": "normal", "mu": 1.55, "sigma": 0.01, "units": "eV"}
    {"prior": "loguniform", "low": 0.01, "high": 10, "units": "meV"}
    {"prior": "truncnormal", "mu": 3.4, "sigma": 0.2, "low": 3.0, "high": 4.0, "units": "1"}

The log densities are normalised densities in the parameter's own units, so the
log posterior is comparable between runs with the same priors.  Prior files (TOML) are
read by :mod:`polkit.config.priors`.
"""

from __future__ import annotations

import json
import math
import os
from collections.abc import Iterable, Iterator, Mapping
from dataclasses import dataclass, field
from typing import Any, NoReturn

import numpy as np
from scipy import special

from polkit.errors import ConfigError

__all__ = ["PRIOR_KINDS", "Prior", "Parameter", "ParameterSpace"]

#: The prior kinds and the numeric keys each one needs, in order.
PRIOR_KINDS: dict[str, tuple[str, ...]] = {
    "uniform": ("low", "high"),
    "normal": ("mu", "sigma"),
    "loguniform": ("low", "high"),
    "truncnormal": ("mu", "sigma", "low", "high"),
}

_LOG_SQRT_2PI = 0.5 * math.log(2.0 * math.pi)


def _log_normal_mass(a: float, b: float) -> float:
    """log(Phi(b) - Phi(a)) for a < b, accurate far in either tail."""
    if a > 0.0:  # use the mirror image so both terms are small upper-tail masses
        a, b = -b, -a
    la, lb = special.log_ndtr(a), special.log_ndtr(b)
    return float(lb + np.log1p(-np.exp(la - lb)))


@dataclass(frozen=True)
class Prior:
    """A one-dimensional prior density.

    Build one with :meth:`uniform`, :meth:`normal`, :meth:`loguniform`,
    :meth:`truncnormal` or :meth:`from_dict`.

    Parameters
    ----------
    kind
        ``"uniform"``, ``"normal"``, ``"loguniform"`` or ``"truncnormal"``.
    mu, sigma
        Centre and standard deviation (normal kinds), in the parameter's units.
    low, high
        Support (uniform kinds, truncnormal), in the parameter's units.
    """

    kind: str
    mu: float | None = None
    sigma: float | None = None
    low: float | None = None
    high: float | None = None
    _lognorm: float = field(default=0.0, repr=False, compare=False)

    def __post_init__(self) -> None:
        if self.kind not in PRIOR_KINDS:
            raise ConfigError(
                f"unknown prior kind {self.kind!r}; expected one of {sorted(PRIOR_KINDS)}",
                key="prior",
            )
        needed = PRIOR_KINDS[self.kind]
        for name in ("mu", "sigma", "low", "high"):
            value = getattr(self, name)
            if name in needed:
                if value is None:
                    raise ConfigError(f"a {self.kind} prior needs '{name}'", key=name)
                object.__setattr__(self, name, _number(value, key=name))
            elif value is not None:
                raise ConfigError(
                    f"a {self.kind} prior takes only {list(needed)}; got '{name}' = {value!r}",
                    key=name,
                )
        for name in ("mu", "sigma"):
            if name in needed and not math.isfinite(getattr(self, name)):
                raise ConfigError(f"{name} must be finite, got {getattr(self, name)!r}", key=name)
        if "sigma" in needed and not self.sigma > 0.0:
            raise ConfigError(f"sigma must be > 0, got {self.sigma!r}", key="sigma")
        if "low" in needed:
            if not self.low < self.high:
                raise ConfigError(
                    f"low must be < high, got low = {self.low!r} and high = {self.high!r}",
                    key="low",
                )
            if not (math.isfinite(self.low) and math.isfinite(self.high)
                    and math.isfinite(self.high - self.low)):
                raise ConfigError(
                    f"low and high must be finite with a finite width, got "
                    f"[{self.low!r}, {self.high!r}]", key="low"
                )
        if self.kind == "loguniform" and not self.low > 0.0:
            raise ConfigError(
                f"a loguniform prior needs low > 0, got low = {self.low!r}", key="low"
            )
        # normalising constant of the log density
        if self.kind == "uniform":
            lognorm = -math.log(self.high - self.low)
        elif self.kind == "loguniform":
            lognorm = -math.log(math.log(self.high) - math.log(self.low))
        elif self.kind == "normal":
            lognorm = -_LOG_SQRT_2PI - math.log(self.sigma)
        else:
            a, b = (self.low - self.mu) / self.sigma, (self.high - self.mu) / self.sigma
            mass = _log_normal_mass(a, b)
            if not math.isfinite(mass):
                raise ConfigError(
                    f"the truncnormal support [{self.low}, {self.high}] holds no probability "
                    f"mass for mu = {self.mu}, sigma = {self.sigma}; move mu or widen sigma",
                    key="mu",
                )
            lognorm = -_LOG_SQRT_2PI - math.log(self.sigma) - mass
        object.__setattr__(self, "_lognorm", lognorm)

    # -- constructors -----------------------------------------------------------------
    @classmethod
    def uniform(cls, low: float, high: float) -> Prior:
        """Flat density on ``[low, high]``."""
        return cls("uniform", low=low, high=high)

    @classmethod
    def normal(cls, mu: float, sigma: float) -> Prior:
        """Gaussian density with mean ``mu`` and standard deviation ``sigma``."""
        return cls("normal", mu=mu, sigma=sigma)

    @classmethod
    def loguniform(cls, low: float, high: float) -> Prior:
        """Density proportional to ``1/x`` on ``[low, high]`` (flat in ``log x``), ``low > 0``."""
        return cls("loguniform", low=low, high=high)

    @classmethod
    def truncnormal(cls, mu: float, sigma: float, low: float, high: float) -> Prior:
        """Gaussian density ``(mu, sigma)`` restricted to ``[low, high]`` and renormalised."""
        return cls("truncnormal", mu=mu, sigma=sigma, low=low, high=high)

    @classmethod
    def from_dict(
        cls,
        entry: Mapping[str, Any],
        *,
        units: str | None = None,
        path: str | os.PathLike | None = None,
        key: str | None = None,
    ) -> Prior:
        """Build a prior from ``{"prior": kind, <numbers>, "units": ...}``.

        Parameters
        ----------
        entry
            The dict (or TOML table).  ``"units"`` is required.
        units
            The parameter's units; when given, ``entry["units"]`` must equal it exactly.
        path, key
            Where the entry came from, for error messages (``key`` is the parameter name).

        Raises
        ------
        ConfigError
            Naming the offending key: unknown kind, unknown or missing keys, missing or
            mismatched units, impossible values.
        """
        prefix = f"{key}." if key else ""

        def refuse(message: str, sub: str) -> NoReturn:
            raise ConfigError(message, path=path, key=prefix + sub)

        if not isinstance(entry, Mapping):
            raise ConfigError(
                f"expected a table such as {{prior = \"uniform\", low = 0, high = 1, "
                f"units = \"...\"}}, got {type(entry).__name__} {entry!r}",
                path=path,
                key=key,
            )
        kind = entry.get("prior")
        if kind is None:
            refuse(f"missing 'prior'; expected one of {sorted(PRIOR_KINDS)}", "prior")
        if not isinstance(kind, str) or kind not in PRIOR_KINDS:
            refuse(f"unknown prior kind {kind!r}; expected one of {sorted(PRIOR_KINDS)}",
                   "prior")
        allowed = {"prior", "units", *PRIOR_KINDS[kind]}
        for name in entry:
            if name not in allowed:
                refuse(f"unknown key {name!r} in a {kind} prior; allowed keys are "
                       f"{sorted(allowed)}", str(name))
        if "units" not in entry:
            hint = f" (expected units = {units!r})" if units is not None else ""
            refuse(f"missing 'units'{hint}; every prior states its units", "units")
        given = entry["units"]
        if not isinstance(given, str):
            refuse(f"units must be text, got {given!r}", "units")
        if units is not None and given != units:
            refuse(f"units {given!r} do not match the parameter's units {units!r}; write the "
                   f"prior in {units!r} (exact spelling)", "units")
        values = {}
        for name in PRIOR_KINDS[kind]:
            if name not in entry:
                refuse(f"a {kind} prior needs {list(PRIOR_KINDS[kind])}; '{name}' is missing",
                       name)
            values[name] = _number(entry[name], key=prefix + name, path=path)
        try:
            return cls(kind, **values)
        except ConfigError as exc:
            raise ConfigError(exc.reason, path=path, key=prefix + str(exc.key)) from None

    # -- densities --------------------------------------------------------------------
    @property
    def bounds(self) -> tuple[float, float]:
        """The support ``(low, high)``; ``(-inf, inf)`` for a normal prior."""
        if self.kind == "normal":
            return (-math.inf, math.inf)
        return (self.low, self.high)

    @property
    def width(self) -> float:
        """A typical spread of the prior in the parameter's units (its standard deviation)."""
        if self.kind == "normal":
            return self.sigma
        if self.kind == "truncnormal":
            return min(self.sigma, (self.high - self.low) / math.sqrt(12.0))
        if self.kind == "uniform":
            return (self.high - self.low) / math.sqrt(12.0)
        log_ratio = math.log(self.high / self.low)  # moments of the 1/x density
        mean = (self.high - self.low) / log_ratio
        second = (self.high**2 - self.low**2) / (2.0 * log_ratio)
        return math.sqrt(max(second - mean**2, 0.0))

    def logpdf(self, x: np.ndarray | float) -> np.ndarray:
        """Normalised log density at ``x`` (any shape); ``-inf`` outside the support."""
        x = np.asarray(x, dtype=float)
        with np.errstate(divide="ignore", invalid="ignore"):
            if self.kind == "uniform":
                out = np.full(x.shape, self._lognorm)
            elif self.kind == "loguniform":
                out = self._lognorm - np.log(np.where(x > 0, x, 1.0))
            else:
                z = (x - self.mu) / self.sigma
                out = self._lognorm - 0.5 * z * z
            if self.kind != "normal":
                out = np.where((x >= self.low) & (x <= self.high), out, -np.inf)
        return np.where(np.isnan(x), -np.inf, out)

    def sample(self, rng: np.random.Generator, n: int) -> np.ndarray:
        """``n`` independent draws from the prior using the generator ``rng``."""
        if self.kind == "uniform":
            return rng.uniform(self.low, self.high, size=n)
        if self.kind == "normal":
            return rng.normal(self.mu, self.sigma, size=n)
        if self.kind == "loguniform":
            return np.exp(rng.uniform(math.log(self.low), math.log(self.high), size=n))
        from scipy import stats  # inverse-CDF sampling, robust in the tails

        a, b = (self.low - self.mu) / self.sigma, (self.high - self.mu) / self.sigma
        u = rng.uniform(size=n)
        draws = stats.truncnorm.ppf(u, a, b, loc=self.mu, scale=self.sigma)
        return np.clip(draws, self.low, self.high)

    def to_dict(self) -> dict[str, Any]:
        """``{"prior": kind, <numbers>}`` (without units; :class:`Parameter` adds them)."""
        return {"prior": self.kind, **{k: getattr(self, k) for k in PRIOR_KINDS[self.kind]}}


def _number(value: Any, *, key: str, path=None) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float, np.integer, np.floating)):
        raise ConfigError(
            f"expected a number, got {type(value).__name__} {value!r}", path=path, key=key
        )
    value = float(value)
    if math.isnan(value):
        raise ConfigError("expected a number, got NaN", path=path, key=key)
    return value


@dataclass(frozen=True)
class Parameter:
    """One sampled parameter.

    Parameters
    ----------
    name
        Identifier used in results and prior files (e.g. ``"rabi_splitting"``).
    units
        Units of the parameter (CF spelling, e.g. ``"meV"``, ``"eV"``, ``"1"``).
    prior
        Its :class:`Prior`, expressed in ``units``.
    description
        Long name written as ``long_name`` in results.
    scale
        A typical step in ``units`` for the optimiser and the initial ensemble;
        ``None`` uses the prior's spread.
    """

    name: str
    units: str
    prior: Prior
    description: str = ""
    scale: float | None = None

    def __post_init__(self) -> None:
        if not isinstance(self.name, str) or not self.name.isidentifier():
            raise ConfigError(
                f"parameter names must be identifiers, got {self.name!r}", key="name"
            )
        if not isinstance(self.units, str) or not self.units:
            raise ConfigError(
                f"parameter {self.name!r} needs units (a non-empty string, '1' if "
                f"dimensionless), got {self.units!r}",
                key=f"{self.name}.units",
            )
        if not isinstance(self.prior, Prior):
            raise ConfigError(
                f"parameter {self.name!r}: prior must be a Prior, got "
                f"{type(self.prior).__name__}",
                key=f"{self.name}.prior",
            )
        if self.scale is not None and not (math.isfinite(self.scale) and self.scale > 0):
            raise ConfigError(
                f"parameter {self.name!r}: scale must be a positive number, got {self.scale!r}",
                key=f"{self.name}.scale",
            )

    @property
    def typical_scale(self) -> float:
        """``scale`` if given, else the prior's spread."""
        return float(self.scale) if self.scale is not None else self.prior.width

    def to_dict(self) -> dict[str, Any]:
        """The prior dict with ``units`` (and ``description`` when set)."""
        out = {**self.prior.to_dict(), "units": self.units}
        if self.description:
            out["description"] = self.description
        return out


class ParameterSpace:
    """An ordered set of :class:`Parameter` objects: the coordinates a fit samples.

    Parameters
    ----------
    params
        The parameters in sampling order; names must be unique.
    """

    def __init__(self, params: Iterable[Parameter]):
        self._params: tuple[Parameter, ...] = tuple(params)
        if not self._params:
            raise ConfigError("a parameter space needs at least one parameter")
        names = [p.name for p in self._params]
        dupes = sorted({n for n in names if names.count(n) > 1})
        if dupes:
            raise ConfigError(f"duplicate parameter names {dupes}", key=dupes[0])
        self._index = {n: i for i, n in enumerate(names)}
        # uniform and log-uniform priors (the common case) are evaluated together
        box = [j for j, p in enumerate(self._params) if p.prior.kind in ("uniform", "loguniform")]
        self._box = np.array(box, dtype=int)
        self._box_lo = np.array([self._params[j].prior.low for j in box], dtype=float)
        self._box_hi = np.array([self._params[j].prior.high for j in box], dtype=float)
        self._box_log = np.array([self._params[j].prior.kind == "loguniform" for j in box],
                                 dtype=bool)
        self._box_norm = float(sum(self._params[j].prior._lognorm for j in box))
        self._other = [j for j in range(len(self._params)) if j not in set(box)]
        # every column a box prior, in order: theta is used as it is (no gathered copy)
        self._box_whole = box == list(range(len(self._params)))
        self._box_any_log = bool(self._box_log.any())

    # -- container protocol -----------------------------------------------------------
    def __len__(self) -> int:
        return len(self._params)

    def __iter__(self) -> Iterator[Parameter]:
        return iter(self._params)

    def __getitem__(self, name: str) -> Parameter:
        try:
            return self._params[self._index[name]]
        except KeyError:
            raise KeyError(f"no parameter {name!r}; known: {self.names}") from None

    def __contains__(self, name: object) -> bool:
        return name in self._index

    def __eq__(self, other: object) -> bool:
        return isinstance(other, ParameterSpace) and self._params == other._params

    def __repr__(self) -> str:
        inner = ", ".join(f"{p.name} [{p.units}]" for p in self._params)
        return f"ParameterSpace({inner})"

    def index(self, name: str) -> int:
        """Column of ``name`` in ``theta``."""
        return self._index[name]

    @property
    def names(self) -> list[str]:
        """Parameter names in order."""
        return [p.name for p in self._params]

    @property
    def units(self) -> list[str]:
        """Parameter units in order."""
        return [p.units for p in self._params]

    @property
    def ndim(self) -> int:
        """Number of parameters ``P``."""
        return len(self._params)

    @property
    def bounds(self) -> np.ndarray:
        """Prior supports as an array of shape ``(P, 2)`` (``±inf`` where unbounded)."""
        return np.array([p.prior.bounds for p in self._params], dtype=float)

    @property
    def scales(self) -> np.ndarray:
        """Typical scale of each parameter, shape ``(P,)``."""
        return np.array([p.typical_scale for p in self._params], dtype=float)

    # -- densities --------------------------------------------------------------------
    def log_prior(self, theta: np.ndarray) -> np.ndarray:
        """Sum of the log prior densities.

        Parameters
        ----------
        theta
            Shape ``(W, P)`` (or ``(P,)`` for one point).

        Returns
        -------
        ndarray
            Shape ``(W,)`` (or a 0-d array); ``-inf`` outside the support.
        """
        theta = np.asarray(theta, dtype=float)
        if theta.shape[-1:] != (self.ndim,):
            raise ValueError(
                f"theta has shape {theta.shape}; expected (..., {self.ndim}) for {self.names}"
            )
        total = np.zeros(theta.shape[:-1])
        if self._box.size:
            x = theta if self._box_whole else theta[..., self._box]
            with np.errstate(invalid="ignore", divide="ignore"):
                inside = np.all((x >= self._box_lo) & (x <= self._box_hi), axis=-1)
                if self._box_any_log:
                    logs = np.log(np.where(self._box_log & (x > 0), x, 1.0)).sum(axis=-1)
                    total = np.where(inside, self._box_norm - logs, -np.inf)
                else:
                    total = np.where(inside, self._box_norm, -np.inf)
        for j in self._other:
            total = total + self._params[j].prior.logpdf(theta[..., j])
        return total

    def sample_prior(self, rng: np.random.Generator, n: int) -> np.ndarray:
        """``n`` independent draws from the joint prior, shape ``(n, P)``."""
        return np.column_stack([p.prior.sample(rng, n) for p in self._params])

    # -- serialisation ----------------------------------------------------------------
    def to_dict(self) -> dict[str, dict[str, Any]]:
        """``{name: {"prior": ..., <numbers>, "units": ...}}`` in order."""
        return {p.name: p.to_dict() for p in self._params}

    def to_json(self) -> str:
        """The priors as JSON text (the form stored in result provenance)."""
        return json.dumps(self.to_dict())

    @classmethod
    def from_dict(cls, source: Mapping[str, Mapping[str, Any]]) -> ParameterSpace:
        """Rebuild a space from :meth:`to_dict` output."""
        params = []
        for name, entry in source.items():
            entry = dict(entry)
            description = entry.pop("description", "")
            units = entry.get("units")
            params.append(
                Parameter(name, units, Prior.from_dict(entry, key=name), description=description)
            )
        return cls(params)

    @classmethod
    def from_json(cls, text: str) -> ParameterSpace:
        """Rebuild a space from :meth:`to_json` output."""
        return cls.from_dict(json.loads(text))

    def with_priors(self, priors: Mapping[str, Prior]) -> ParameterSpace:
        """A copy with some priors replaced (``{name: Prior}``)."""
        for name in priors:
            if name not in self._index:
                raise ConfigError(f"unknown parameter; known parameters are {self.names}", key=name)
        return ParameterSpace(
            Parameter(p.name, p.units, priors.get(p.name, p.prior), p.description, p.scale)
            for p in self._params
        )
