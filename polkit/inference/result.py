"""The answer of a fit: posterior draws, derived quantities, diagnostics and provenance.

A :class:`FitResult` wraps one :class:`xarray.DataTree` laid out as ArviZ expects:

* ``posterior``: every sampled parameter and every derived quantity, dims
  ``(chain, draw)``, each with ``units`` and ``long_name``.  Derived quantities are
  computed per draw by the workflow, never from medians.  A *flag* (a boolean per
  draw, e.g. "the splitting exceeds the mean linewidth") is stored as int8 with
  ``polkit_role = "flag"`` and units ``"1"``;
* ``probabilities``: 0-d variables (units ``"1"``, values in [0, 1]) for
  probabilities computed outside the draws;
* ``sample_stats``: ``lp`` (log posterior) and per-walker ``acceptance``;
* ``observed_data``: the data fitted (may be empty);
* root attributes: ``model``, ``kind``, ``converged`` (int), ``diagnostics`` and
  ``provenance`` (JSON text: netCDF attributes cannot hold bool, None or dicts).

``summary()`` gives the ``summary.json`` layout::

    {"model": str, "kind": str,
     "parameters": {name: {"median", "q16", "q84", "q2_5", "q97_5", "units"}},
     "probabilities": {name: {"value", "units", "long_name"}},
     "diagnostics": {"converged", "steps", "walkers", "max_autocorr_time",
                     "min_ess_bulk", "max_rhat", "acceptance_fraction", ...},
     "provenance": {"polkit_version", "input_sha256", "seed", "created", ...},
     "model_check": {...}}   # only where the job stored one (root attribute, JSON text)

``parameters`` lists sampled parameters and derived quantities; ``probabilities``
lists flags (the fraction of draws where the flag holds) and the 0-d
probabilities.
"""

from __future__ import annotations

import html
import json
import logging
import math
import os
import platform
from collections.abc import Mapping
from datetime import UTC, datetime
from pathlib import Path
from typing import Any, NoReturn

import numpy as np
import xarray as xr

from polkit._paths import shareable_attrs
from polkit.errors import ConfigError, DataError
from polkit.files import json_safe, write_json, write_netcdf
from polkit.inference.output import SamplerOutput
from polkit.inference.priors import ParameterSpace
from polkit.provenance import library_versions

__all__ = ["FitResult", "POSTERIOR_FILE", "SUMMARY_FILE"]

log = logging.getLogger(__name__)

POSTERIOR_FILE = "posterior.nc"
SUMMARY_FILE = "summary.json"
_FORMAT = "1"
_QUANTILES = {"q2_5": 0.025, "q16": 0.16, "median": 0.5, "q84": 0.84, "q97_5": 0.975}
_LIBRARIES = ("numpy", "scipy", "xarray", "emcee", "arviz", "h5netcdf", "h5py")


def _json_text(obj: Any) -> str:
    return json.dumps(json_safe(obj), allow_nan=False)


def _attr_value(key: str, value: Any):
    """A netCDF-safe attribute value: bool -> int, containers and None -> JSON text."""
    if isinstance(value, (bool, np.bool_)):
        return int(value)
    if isinstance(value, (str, int, float, np.integer, np.floating)):
        return value
    try:
        return _json_text(value)
    except TypeError:
        raise ConfigError(
            f"attribute value of type {type(value).__name__} cannot be stored; use text, "
            "numbers or JSON-compatible containers",
            key=key,
        ) from None


def _library_versions() -> dict[str, str]:
    return {"python": platform.python_version(), **library_versions(_LIBRARIES)}


def _polkit_version() -> str:
    from polkit import __version__

    return __version__

def _derived_entry(name, entry, posterior, shape):
    """One derived quantity checked: ``(values, attrs)``, values ``None`` for a 0-d
    probability (then ``attrs`` carries it as ``(p, attrs)``)."""
    key = f"derived.{name}"
    if not (isinstance(entry, tuple) and len(entry) == 3):
        raise ConfigError("expected (values, units, long_name) for a derived quantity",
                          key=key)
    values, units, long_name = entry
    if not isinstance(name, str) or not name.isidentifier():
        raise ConfigError(f"derived names must be identifiers, got {name!r}", key=key)
    if name in posterior:
        raise ConfigError(f"derived name {name!r} clashes with a sampled quantity", key=key)
    if not isinstance(units, str) or not units:
        raise ConfigError(
            f"derived quantity needs units (text, '1' if dimensionless); got "
            f"{units!r}",
            key=key,
        )
    values = np.asarray(values)
    attrs = {"units": units, "long_name": str(long_name)}
    if values.ndim == 0:
        p = float(values)
        if units != "1" or not 0.0 <= p <= 1.0:
            raise ConfigError(
                f"a 0-d derived value is a probability: units '1' and a value in "
                f"[0, 1]; got {p!r} {units!r} (put other scalars in extra_attrs)",
                key=key,
            )
        return None, (p, attrs)
    if values.shape == (shape[0] * shape[1],):
        values = values.reshape(shape)
    if values.shape != shape:
        raise ConfigError(
            f"derived values have shape {values.shape}; expected the draws' shape "
            f"{shape} (chain, draw) or ({shape[0] * shape[1]},)",
            key=key,
        )
    if values.dtype == bool:
        if units != "1":
            raise ConfigError(f"a flag has units '1', got {units!r}", key=key)
        values = values.astype(np.int8)
        attrs["polkit_role"] = "flag"
    else:
        values = values.astype(float)
    return values, attrs


def _add_derived(posterior: xr.Dataset, derived) -> dict:
    """Add the derived quantities to ``posterior``; returns the 0-d probabilities."""
    shape = (posterior.sizes["chain"], posterior.sizes["draw"])
    probabilities = {}
    for name, entry in (derived or {}).items():
        values, attrs = _derived_entry(name, entry, posterior, shape)
        if values is None:
            p, attrs = attrs
            probabilities[name] = ((), p, attrs)
            continue
        posterior[name] = (("chain", "draw"), values, attrs)
    return probabilities


def _provenance(output: SamplerOutput, space: ParameterSpace, provenance) -> dict[str, Any]:
    """The caller's provenance with polkit's version, the seed, the priors and libraries."""
    user = dict(provenance or {})
    prov: dict[str, Any] = {
        "polkit_version": _polkit_version(),
        "input_sha256": None,
        "created": datetime.now(UTC).isoformat(timespec="seconds"),
    }
    prov.update(user)
    prov["seed"] = int(output.seed_entropy)
    prov["seed_spawn_key"] = list(output.seed_spawn_key)
    prov["priors"] = space.to_dict()
    prov.setdefault("libraries", _library_versions())
    return prov


def _root_attrs(output: SamplerOutput, prov: dict, *, model, kind, extra_attrs) -> dict:
    """The root attributes of a result, free of a machine's paths."""
    attrs = {
        "model": str(model),
        "kind": str(kind),
        "converged": int(bool(output.converged)),
        "diagnostics": _json_text(output.diagnostics),
        "provenance": _json_text(prov),
        "polkit_result_format": _FORMAT,
        "created_by": f"polkit {prov['polkit_version']}",
    }
    for key, value in (extra_attrs or {}).items():
        if key in attrs:
            raise ConfigError(f"extra attribute {key!r} would overwrite polkit's", key=key)
        attrs[str(key)] = _attr_value(key, value)
    # shared files name inputs by file name and SHA-256, not by a machine's paths
    return shareable_attrs(attrs)



class FitResult:
    """Posterior draws with units, derived quantities, diagnostics and provenance.

    Parameters
    ----------
    tree
        A DataTree in the layout described in the module docstring (as built by
        :meth:`from_samples` or read by :meth:`load`).

    Raises
    ------
    DataError
        If the tree lacks the ``posterior`` group or the root attributes.
    """

    def __init__(self, tree: xr.DataTree, *, path: str | os.PathLike | None = None):
        _check_tree(tree, path)
        self._tree = tree

    # -- construction ---------------------------------------------------------------------
    @classmethod
    def from_samples(
        cls,
        output: SamplerOutput,
        space: ParameterSpace,
        *,
        derived: Mapping[str, tuple[np.ndarray, str, str]] | None = None,
        model: str,
        kind: str,
        observed: xr.Dataset | None = None,
        provenance: Mapping[str, Any] | None = None,
        extra_attrs: Mapping[str, Any] | None = None,
    ) -> FitResult:
        """Build a result from a sampler run.

        Parameters
        ----------
        output
            The run.
        space
            The parameter space sampled (its priors go into the provenance).
        derived
            ``{name: (values, units, long_name)}``.  ``values`` is shaped like the
            draws, ``(chain, draw)``, or flat ``(chain * draw,)`` in the order of
            :meth:`draws`; a boolean array is a flag; a 0-d value (units ``"1"``, in
            [0, 1]) is a probability.
        model, kind
            Model name and job kind (e.g. ``"coupled_oscillator"``, ``"dispersion"``).
        observed
            The data fitted, stored as ``observed_data``.
        provenance
            At least ``input_sha256`` (hex digest of the input file); any further
            JSON-compatible entries are kept.  polkit adds its version, the seed,
            the creation time, the priors and library versions.
        extra_attrs
            Further root attributes (text, numbers; containers become JSON text).

        Raises
        ------
        ConfigError
            A derived quantity with the wrong shape, no units, or a name that clashes.
        """
        if space.names != output.names:
            raise ConfigError(
                f"the space has parameters {space.names} but the run sampled "
                f"{output.names}",
                key="space",
            )
        posterior = output.posterior_draws()
        probabilities = _add_derived(posterior, derived)
        prov = _provenance(output, space, provenance)
        attrs = _root_attrs(output, prov, model=model, kind=kind, extra_attrs=extra_attrs)
        if observed is not None:
            observed = observed.copy(deep=False)
            observed.attrs = shareable_attrs(dict(observed.attrs))
            for name in list(observed.variables):
                observed[name].attrs = shareable_attrs(dict(observed[name].attrs))
        tree = xr.DataTree.from_dict(
            {
                "/": xr.Dataset(attrs=attrs),
                "posterior": posterior,
                "sample_stats": output.sample_stats(),
                "observed_data": observed if observed is not None else xr.Dataset(),
                "probabilities": xr.Dataset(probabilities),
            }
        )
        return cls(tree)

    @classmethod
    def from_datatree(cls, tree: xr.DataTree) -> FitResult:
        """Wrap an existing DataTree (checked like :meth:`load`)."""
        return cls(tree)

    # -- access ---------------------------------------------------------------------------
    @property
    def tree(self) -> xr.DataTree:
        """The underlying DataTree."""
        return self._tree

    @property
    def posterior(self) -> xr.Dataset:
        """Posterior draws and derived quantities, dims ``(chain, draw)``."""
        return self._tree["posterior"].to_dataset()

    @property
    def model(self) -> str:
        """Model name."""
        return str(self._tree.attrs["model"])

    @property
    def kind(self) -> str:
        """Job kind."""
        return str(self._tree.attrs["kind"])

    @property
    def diagnostics(self) -> dict[str, Any]:
        """Convergence diagnostics of the run."""
        return json.loads(self._tree.attrs["diagnostics"])

    @property
    def provenance(self) -> dict[str, Any]:
        """Versions, seed, input hash, priors and creation time."""
        return json.loads(self._tree.attrs["provenance"])

    @property
    def model_check(self) -> dict[str, Any] | None:
        """The model check (does the model describe the data?), or ``None`` when none ran.

        Stored as JSON text in the root attribute ``model_check`` (pass it through
        ``extra_attrs={"model_check": {...}}`` of :meth:`from_samples`); at least
        ``{"passed": bool, ...}``.  It is separate from convergence: a chain can converge
        to a model that does not describe the data.
        """
        text = self._tree.attrs.get("model_check")
        return None if text is None else json.loads(text)

    @property
    def converged(self) -> bool:
        """Whether the run passed its convergence gate."""
        return bool(int(self._tree.attrs["converged"]))

    @property
    def space(self) -> ParameterSpace:
        """The parameter space (priors) the run sampled, rebuilt from the provenance."""
        return ParameterSpace.from_dict(self.provenance["priors"])

    def draws(self, name: str) -> np.ndarray:
        """All draws of ``name`` flattened over ``chain x draw`` (chain-major).

        Raises
        ------
        DataError
            If ``name`` is not a posterior variable (the known ones are listed).
        """
        post = self._tree["posterior"]
        if name not in post.data_vars:
            raise DataError(
                f"no posterior variable {name!r}; known: {sorted(post.data_vars)}", field=name
            )
        return np.asarray(post[name].transpose("chain", "draw").values).reshape(-1)

    # -- summaries ------------------------------------------------------------------------
    def summary(self) -> dict[str, Any]:
        """The ``summary.json`` dict (layout in the module docstring)."""
        parameters: dict[str, dict[str, Any]] = {}
        probabilities: dict[str, dict[str, Any]] = {}
        post = self._tree["posterior"]
        for name, var in post.data_vars.items():
            units = str(var.attrs.get("units", ""))
            values = np.asarray(var.values, dtype=float).reshape(-1)
            if var.attrs.get("polkit_role") == "flag":
                probabilities[name] = {
                    "value": float(np.mean(values)),
                    "units": "1",
                    "long_name": str(var.attrs.get("long_name", name)),
                }
                continue
            finite = values[np.isfinite(values)]
            entry: dict[str, Any] = {}
            for key in ("median", "q16", "q84", "q2_5", "q97_5"):
                entry[key] = (
                    float(np.quantile(finite, _QUANTILES[key])) if finite.size else None
                )
            entry["units"] = units
            parameters[name] = entry
        if "probabilities" in self._tree.children:
            for name, var in self._tree["probabilities"].data_vars.items():
                probabilities[name] = {
                    "value": float(var.values),
                    "units": str(var.attrs.get("units", "1")),
                    "long_name": str(var.attrs.get("long_name", name)),
                }
        out = {
            "model": self.model,
            "kind": self.kind,
            "parameters": parameters,
            "probabilities": probabilities,
            "diagnostics": self.diagnostics,
            "provenance": self.provenance,
        }
        check = self.model_check
        if check is not None:
            out["model_check"] = check
        return out

    def _rows(self) -> list[tuple[str, str, str, str, str, str]]:
        rows = []
        summary = self.summary()
        for name, e in summary["parameters"].items():
            if e["median"] is None:
                rows.append((name, e["units"], "n/a", "", "", ""))
                continue
            minus, plus = e["median"] - e["q16"], e["q84"] - e["median"]
            err = min(v for v in (minus, plus) if v > 0) if max(minus, plus) > 0 else 0.0
            rows.append(
                (
                    name,
                    e["units"],
                    _fmt(e["median"], err),
                    "-" + _fmt(minus, err),
                    "+" + _fmt(plus, err),
                    f"[{_fmt(e['q2_5'], err)}, {_fmt(e['q97_5'], err)}]",
                )
            )
        return rows

    def _status(self) -> str:
        d = self.diagnostics
        if self.converged:
            tau = d.get("max_autocorr_time")
            ess = d.get("min_ess_bulk")
            return (
                f"converged: {d.get('steps')} steps x {d.get('walkers')} walkers x "
                f"{d.get('n_ensembles', 1)} ensemble(s), max tau "
                f"{math.nan if tau is None else tau:.1f}, min bulk ESS "
                f"{math.nan if ess is None else ess:.0f}"
            )
        return "NOT converged: " + "; ".join(d.get("reasons", []) or ["see diagnostics"])

    def _prob_label(self, name: str) -> str:
        """``P(flag)`` for a per-draw flag, the plain name for a stored probability."""
        return f"P({name})" if name in self._tree["posterior"].data_vars else name

    def table(self) -> str:
        """A plain-text table: median, -/+ 68 % interval and 95 % interval, with units."""
        header = ("parameter", "units", "median", "-68%", "+68%", "95% interval")
        rows = [header, *self._rows()]
        widths = [max(len(r[i]) for r in rows) for i in range(len(header))]
        lines = [f"{self.model} ({self.kind}) -- {self._status()}"]
        for k, r in enumerate(rows):
            lines.append(
                "  ".join(
                    c.ljust(w) if i < 2 else c.rjust(w)
                    for i, (c, w) in enumerate(zip(r, widths, strict=True))
                ).rstrip()
            )
            if k == 0:
                lines.append("  ".join("-" * w for w in widths))
        probs = self.summary()["probabilities"]
        if probs:
            lines.append("")
            for name, e in probs.items():
                lines.append(f"{self._prob_label(name)} = {e['value']:.3f}   {e['long_name']}")
        return "\n".join(lines)

    def __str__(self) -> str:
        return self.table()

    def __repr__(self) -> str:
        names = list(self._tree["posterior"].data_vars)
        status = "converged" if self.converged else "NOT converged"
        return f"<FitResult {self.model} ({self.kind}), {status}, variables {names}>"

    def _repr_html_(self) -> str:
        ok = self.converged
        colour, border = ("#e6f4ea", "#1e7e34") if ok else ("#fdecea", "#b02a37")
        esc = html.escape
        parts = [
            f"<div><p><b>{esc(self.model)}</b> ({esc(self.kind)})</p>",
            f'<div style="background:{colour};border-left:4px solid {border};padding:4px 8px;'
            f'margin-bottom:6px">{esc(self._status())}</div>',
            '<table><thead><tr><th style="text-align:left">parameter</th>'
            '<th style="text-align:left">units</th><th>median</th><th>&minus;68%</th>'
            "<th>+68%</th><th>95% interval</th></tr></thead><tbody>",
        ]
        for row in self._rows():
            cells = "".join(
                f'<td style="text-align:{"left" if i < 2 else "right"}">{esc(c)}</td>'
                for i, c in enumerate(row)
            )
            parts.append(f"<tr>{cells}</tr>")
        parts.append("</tbody></table>")
        probs = self.summary()["probabilities"]
        if probs:
            parts.append("<ul>")
            for name, e in probs.items():
                parts.append(
                    f"<li>{esc(self._prob_label(name))} = {e['value']:.3f} &mdash; "
                    f"{esc(e['long_name'])}</li>"
                )
            parts.append("</ul>")
        parts.append("</div>")
        return "".join(parts)

    # -- files ----------------------------------------------------------------------------
    def save(self, folder: str | os.PathLike) -> Path:
        """Write ``posterior.nc`` and ``summary.json`` into ``folder`` atomically.

        Returns
        -------
        Path
            The folder.
        """
        folder = Path(folder)
        folder.mkdir(parents=True, exist_ok=True)
        write_netcdf(folder / POSTERIOR_FILE, self._tree)
        write_json(folder / SUMMARY_FILE, self.summary())
        log.info("result written to %s", folder)
        return folder

    @classmethod
    def load(cls, folder: str | os.PathLike) -> FitResult:
        """Read a result written by :meth:`save` (fully loaded; the file is closed).

        Raises
        ------
        DataError
            If the folder or one of its files is missing, or the files are not a
            polkit result.
        """
        folder = Path(folder)
        if not folder.is_dir():
            raise DataError(
                f"not a folder; expected a polkit result folder holding {POSTERIOR_FILE} "
                f"and {SUMMARY_FILE}",
                path=folder,
            )
        for name in (POSTERIOR_FILE, SUMMARY_FILE):
            if not (folder / name).is_file():
                raise DataError(
                    f"missing {name}: this folder is not a polkit result (expected "
                    f"{POSTERIOR_FILE} and {SUMMARY_FILE} written by FitResult.save)",
                    path=folder / name,
                )
        path = folder / POSTERIOR_FILE
        try:
            with xr.open_datatree(path, engine="h5netcdf") as opened:
                tree = opened.load().copy(deep=True)
        except (OSError, ValueError) as exc:
            raise DataError(
                f"cannot read the posterior file ({exc}); expected netCDF-4 written by "
                "FitResult.save",
                path=path,
            ) from None
        result = cls(tree, path=path)
        try:
            saved = json.loads((folder / SUMMARY_FILE).read_text(encoding="utf-8"))
        except (OSError, ValueError) as exc:
            raise DataError(
                f"cannot read the summary ({exc}); expected JSON written by FitResult.save",
                path=folder / SUMMARY_FILE,
            ) from None
        missing = [k for k in ("model", "kind", "parameters", "diagnostics", "provenance")
                   if not isinstance(saved, dict) or k not in saved]
        if missing:
            raise DataError(
                f"summary lacks {missing}: not a polkit result summary (expected the layout "
                "written by FitResult.save)",
                path=folder / SUMMARY_FILE,
                field=missing[0],
            )
        return result


def _check_tree(tree, path) -> None:
    def refuse(message: str, field: str) -> NoReturn:
        raise DataError(message, path=path, field=field)

    if not isinstance(tree, xr.DataTree):
        raise DataError(f"expected an xarray.DataTree, got {type(tree).__name__}", path=path)
    for key in ("model", "kind", "converged", "diagnostics", "provenance"):
        if key not in tree.attrs:
            refuse(f"root attribute {key!r} is missing: not a polkit result", key)
    if "posterior" not in tree.children:
        refuse("no 'posterior' group: not a polkit result", "posterior")
    post = tree["posterior"]
    for name, var in post.data_vars.items():
        if set(var.dims) != {"chain", "draw"}:
            refuse(f"posterior variable has dims {var.dims}; expected ('chain', 'draw')", name)
        if "units" not in var.attrs:
            refuse("posterior variable has no 'units' attribute", name)


def _fmt(value: float, err: float) -> str:
    """``value`` with two significant digits of ``err`` (plain ``g`` format when odd)."""
    if value is None or not math.isfinite(value):
        return "nan"
    if err > 0 and math.isfinite(err):
        decimals = 1 - int(math.floor(math.log10(err)))
        if 0 <= decimals <= 8 and abs(value) < 1e7:
            return f"{value:.{decimals}f}"
    return f"{value:.4g}"
