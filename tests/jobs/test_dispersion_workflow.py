"""The dispersion job end to end: recovery on simulated maps, an outside cross-check with a
transfer-matrix library, resume, seeds and bad input."""

from __future__ import annotations

import dataclasses
import json
import threading
import warnings

import numpy as np
import pytest

from polkit import ConfigError, ConvergenceWarning, DataError, DataWarning
from polkit.data import make_map
from polkit.inference import FitResult, SamplerSettings
from polkit.jobs.dispersion.run import fit_dispersion
from polkit.models.simulate import simulate_map

MEV = 1e-3
#: no progress bar, the job's default step limits
QUIET = SamplerSettings(progress=False)


def _simulated(
    truth,
    *,
    kind="emission",
    n_angle=17,
    n_energy=110,
    seed=0,
    peak_counts=2000.0,
    angles=(-20.0, 20.0),
    window=None,
    upper=0.3,
):
    """A noisy map of the project's own linear model with known truth (seeded)."""
    rng = np.random.default_rng(seed)
    ang = np.linspace(*angles, n_angle)
    span = truth["rabi"] * MEV
    lo, hi = window or (truth["e_lp0"] - 1.2 * span, truth["e_x"] + 1.6 * span)
    energy = np.linspace(lo, hi, n_energy)
    phys = dict(
        e_c0=truth["e_c0"],
        n_eff=truth["n_eff"],
        e_x=truth["e_x"],
        g=0.5 * truth["rabi"] * MEV,
        gamma_c=truth["gc"] * MEV,
        gamma_x=truth["gx"] * MEV,
    )
    if kind == "emission":
        unit = simulate_map(ang, energy, kind="emission", amplitudes=[1.0, upper], **phys)
        scale = peak_counts / unit.signal.max()
        mean = simulate_map(
            ang, energy, kind="emission", amplitudes=[scale, upper * scale], background=50.0, **phys
        ).signal
        y = rng.poisson(mean) + rng.normal(0.0, 3.0, mean.shape)
        return make_map(
            y, angle=ang, energy=energy, units="counts", kind="emission", gain=1.0, read_noise=3.0
        )
    mean = simulate_map(
        ang,
        energy,
        kind="reflectance",
        kappa=truth["kappa"] * MEV,
        amplitudes=0.9,
        background=0.0,
        **phys,
    ).signal
    y = mean + rng.normal(0.0, 0.005, mean.shape)
    return make_map(y, angle=ang, energy=energy, units="1", kind="reflectance")


GAAS = dict(
    e_x=1.5450, e_c0=1.5420, n_eff=3.4, rabi=10.0, gc=0.25, gx=0.6, e_lp0=1.5380, kappa=0.15
)
# room-temperature perovskite-like cavity: broad lines, large splitting (value ranges from memory)
PEROVSKITE = dict(
    e_x=2.400, e_c0=2.380, n_eff=2.0, rabi=120.0, gc=15.0, gx=40.0, e_lp0=2.3238, kappa=8.0
)


def _inside(result, name, value, n_checks=1):
    """Truth inside the central interval of family-wise 95 % over ``n_checks`` quantities.

    Source: Bonferroni correction -- each of n checks at level 1 - 0.05/n keeps the chance
    that any calibrated check fails by accident at or below 5 %.
    """
    alpha = 0.05 / n_checks
    d = result.draws(name)
    lo, hi = np.quantile(d, [alpha / 2, 1 - alpha / 2])
    return lo <= value <= hi, (float(lo), float(np.median(d)), float(hi))


@pytest.mark.parametrize(
    ("truth", "kind", "seed"),
    [(GAAS, "emission", 11), (PEROVSKITE, "emission", 12), (GAAS, "reflectance", 13)],
    ids=["gaas-emission", "perovskite-emission", "gaas-reflectance"],
)
def test_whole_map_recovers_known_parameters(truth, kind, seed, tmp_path):
    # Self-consistency check: data from polkit's own forward model (seeded noise);
    # a calibrated posterior holds the truths inside their intervals (family-wise 95 %).
    da = _simulated(truth, kind=kind, seed=seed)
    r = fit_dispersion(da, seed=seed, out=tmp_path / "fit",
                       sampler=SamplerSettings(progress=False, max_steps=12000))
    assert r.converged, r.diagnostics["reasons"]
    delta = (truth["e_c0"] - truth["e_x"]) / MEV
    # Hopfield fractions at k = 0 follow from the truth (Hopfield, Phys. Rev. 112, 1555, 1958)
    x2 = 0.5 * (1 + delta / np.hypot(delta, truth["rabi"]))
    checks = (
        ("exciton_energy", truth["e_x"]),
        ("cavity_energy", truth["e_c0"]),
        ("rabi_splitting", truth["rabi"]),
        ("detuning", delta),
        ("cavity_linewidth", truth["gc"]),
        ("exciton_linewidth", truth["gx"]),
        ("exciton_fraction_k0", x2),
    )
    for name, value in checks:
        ok, p = _inside(r, name, value, n_checks=len(checks))
        assert ok, (name, value, p)
    # intervals of sensible width: resolved (not the prior) and not absurdly narrow
    p = r.summary()["parameters"]["rabi_splitting"]
    width = p["q97_5"] - p["q2_5"]
    assert 1e-5 * truth["rabi"] < width < 0.1 * truth["rabi"]
    # files a collaborator can reload
    for name in (
        "posterior.nc",
        "summary.json",
        "fit.png",
        "residuals.png",
        "corner.png",
        "traces.png",
        "spectra.png",
    ):
        assert (tmp_path / "fit" / name).is_file(), name
    again = FitResult.load(tmp_path / "fit")
    assert again.summary()["parameters"] == r.summary()["parameters"]
    summary = json.loads((tmp_path / "fit" / "summary.json").read_text())
    assert summary["parameters"]["rabi_splitting"]["units"] == "meV"
    assert summary["parameters"]["exciton_energy"]["units"] == "eV"
    assert summary["diagnostics"]["converged"] is True


def test_transfer_matrix_reflectance_gives_the_dip_splitting(tmp_path):
    # Source: Zhu et al., PRL 64, 2499 (1990): a Lorentz-oscillator quantum well in a DBR
    # cavity gives two reflectance dips whose splitting at resonance is the normal-mode
    # (Rabi) splitting; computed here with the general-purpose `tmm` library, which knows
    # nothing of polaritons. The fitted 2g must match the dip splitting within 3 %
    # (dip positions of a lossy reflectance differ from branch energies by a few percent
    # of the splitting; common practice, no published tolerance).
    tmm_reference = pytest.importorskip("tmm_reference")
    CAVITY, reflectance_dips = tmm_reference.CAVITY, tmm_reference.reflectance_dips

    angles = np.linspace(0.0, 21.0, 11)
    energies = np.linspace(1.5225, 1.5375, 150)
    refl = tmm_reference.reflectance_map(angles, energies, CAVITY)
    rng = np.random.default_rng(5)
    da = make_map(
        refl + rng.normal(0, 0.002, refl.shape),
        angle=angles,
        energy=energies,
        units="1",
        kind="reflectance",
    )
    r = fit_dispersion(da, seed=5, sampler=SamplerSettings(progress=False, max_steps=12000))
    assert r.converged, r.diagnostics["reasons"]
    s = r.summary()["parameters"]
    e_x, e_c0, n_eff = (s[n]["median"] for n in ("exciton_energy", "cavity_energy", "n_eff"))
    theta_res = np.rad2deg(np.arcsin(n_eff * np.sqrt(1.0 - (e_c0 / e_x) ** 2)))
    dips = reflectance_dips(CAVITY, theta_res, lo=e_x - 0.004, hi=e_x + 0.004, step=1e-4)
    assert dips.size == 2
    assert s["rabi_splitting"]["median"] == pytest.approx((dips[1] - dips[0]) / MEV, rel=0.03)


def test_peak_table_path_is_fast_and_close(tmp_path):
    # Self-consistency check (polkit's own forward model); the peak-table path is an approximation
    # (line maxima of fitted Lorentzians), so it is checked at 5 sigma, not 2.
    da = _simulated(GAAS, seed=21)
    r = fit_dispersion(da, peaks_only=True, seed=3,
                       sampler=SamplerSettings(progress=False, max_steps=12000))
    assert r.tree.attrs["fit_path"] == "peak_table"
    assert r.converged, r.diagnostics["reasons"]
    # closeness in absolute terms, so that a wide posterior cannot pass the sigma test: the
    # truth within 5 sigma AND within a fixed bound, with sigma itself below a bound
    # (common practice, no published source: bounds of a few percent of the linewidths)
    bounds = {  # name: (truth, largest |median - truth|, largest sigma), meV or eV
        "exciton_energy": (GAAS["e_x"], 0.2 * MEV, 0.05 * MEV),
        "cavity_energy": (GAAS["e_c0"], 0.2 * MEV, 0.05 * MEV),
        "rabi_splitting": (GAAS["rabi"], 0.2, 0.1),
    }
    for name, (value, max_error, max_sigma) in bounds.items():
        p = r.summary()["parameters"][name]
        sigma = 0.5 * (p["q84"] - p["q16"])
        assert abs(p["median"] - value) < 5 * sigma, (name, p)
        assert abs(p["median"] - value) < max_error, (name, p)
        assert 0 < sigma < max_sigma, (name, p)


class _StopAfter(threading.Event):
    """A stop button pressed after ``n`` sampling steps (the runner asks once per step)."""

    def __init__(self, n: int):
        super().__init__()
        self.left = n

    def is_set(self) -> bool:
        self.left -= 1
        return self.left <= 0


def test_same_seed_same_summary_and_resume(tmp_path):
    # common practice, no published source: a recorded seed reproduces the run bit for bit,
    # and a run interrupted and continued from its checkpoint equals an uninterrupted one.
    da = _simulated(GAAS, seed=31, n_angle=15, n_energy=100)
    settings = SamplerSettings(progress=False, max_steps=600)
    kw = dict(peaks_only=True, seed=7)
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)  # 600 steps: short on purpose
        a = fit_dispersion(da, out=tmp_path / "a", sampler=settings, **kw)
        b = fit_dispersion(da, out=tmp_path / "b", sampler=settings, **kw)
        assert a.summary()["parameters"] == b.summary()["parameters"]
        # interrupt a run part-way (the notebook's stop button does the same), then resume;
        # the stop fires after a fixed number of steps, whatever the machine's speed
        stop = _StopAfter(250)
        part = fit_dispersion(da, out=tmp_path / "c",
                              sampler=dataclasses.replace(settings, stop_event=stop), **kw)
        assert part.converged is False
        assert part.diagnostics["stopped"] is True  # the stop really fired
        assert part.diagnostics["steps"] == 250 < a.diagnostics["steps"]
        cont = fit_dispersion(da, out=tmp_path / "c", resume=True, sampler=settings, **kw)
    assert cont.diagnostics["steps"] == a.diagnostics["steps"]
    np.testing.assert_array_equal(cont.draws("rabi_splitting"), a.draws("rabi_splitting"))


def test_bad_priors_are_refused_with_the_key(tmp_path):
    da = _simulated(GAAS, seed=41, n_angle=15, n_energy=100)
    bad = tmp_path / "priors.toml"
    bad.write_text('[rabi_splitting]\nprior = "uniform"\nlow = 5\nhigh = 20\nunits = "eV"\n')
    with pytest.raises(ConfigError, match="rabi_splitting"):
        fit_dispersion(da, priors=bad, peaks_only=True, sampler=QUIET)
    with pytest.raises(ConfigError, match="rabi_spliting"):
        fit_dispersion(
            da,
            priors={"rabi_spliting": {"prior": "uniform", "low": 1, "high": 2, "units": "meV"}},
            peaks_only=True,
            sampler=QUIET,
        )


def test_map_without_branch_is_refused():
    rng = np.random.default_rng(51)
    da = make_map(
        50 + rng.normal(0, 3, (15, 120)),
        angle=np.linspace(-10, 10, 15),
        energy=np.linspace(1.53, 1.56, 120),
        units="counts",
        kind="emission",
    )
    with pytest.raises(DataError, match="no branch"):
        fit_dispersion(da, sampler=QUIET)


def test_one_visible_branch_warns_that_g_and_detuning_are_degenerate():
    # common practice, no published source (one branch's energy cannot fix both g and delta)
    da = _simulated(GAAS, seed=61, n_angle=15, n_energy=120, upper=0.0, window=(1.532, 1.5435))
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        fit_dispersion(da, peaks_only=True, sampler=SamplerSettings(progress=False, max_steps=200))
    assert any(
        issubclass(w.category, DataWarning) and "degenerate" in str(w.message) for w in caught
    ), [str(w.message) for w in caught]


def test_the_callers_gate_reaches_the_run():
    # common practice, no published source: a setting the caller passes in SamplerSettings
    # must govern the run (a stricter gate silently dropped would report a weaker check)
    from polkit.inference import GateSettings

    da = _simulated(GAAS, seed=21)
    strict = SamplerSettings(progress=False, max_steps=3000,
                             gate=GateSettings(ess_target=1500.0))
    r = fit_dispersion(da, peaks_only=True, seed=3, sampler=strict, figures=False)
    targets = r.diagnostics["ess_target"]
    assert targets["rabi_splitting"] == pytest.approx(1500.0), targets


def test_loader_options_with_a_map_in_memory_are_refused_not_ignored():
    # common practice, no published source: an option that cannot act (the map was read
    # already) is refused with its fix, so a user never believes it was applied
    from polkit.data import LoadOptions

    da = _simulated(GAAS, seed=21)
    with pytest.raises(ConfigError, match="wavelength_medium apply when reading a file"):
        fit_dispersion(da, peaks_only=True, seed=3, sampler=QUIET,
                       load=LoadOptions(wavelength_medium="air"))
