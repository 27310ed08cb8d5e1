"""Results that cannot be mixed up: the fit identity of a checkpoint, the output-folder lock,
and resumes after a kill at every window before, around and after sampling.

Every map here is invented: simulated with the project's own linear model and a fixed seed
(these are self-consistency checks of resume and locking, not recovery tests).
"""

from __future__ import annotations

import json
import os
import socket
import subprocess
import sys
import warnings
from pathlib import Path

import h5py
import numpy as np
import pytest

from polkit import files
from polkit.cli import main
from polkit.data import make_map
from polkit.errors import ConvergenceWarning, DataError
from polkit.folder_lock import LOCK_FILE, FolderLockedError, folder_lock, read_lock
from polkit.inference import SamplerSettings
from polkit.inference import checkpoint as checkpoint_module
from polkit.jobs import steps as _steps
from polkit.jobs.dispersion.run import DispersionFit, fit_dispersion
from polkit.models.simulate import simulate_map

MEV = 1e-3
SEED = 5
STEPS = 200  # below the 50-tau gate of this peak table: every run stops at exactly STEPS
KW = dict(peaks_only=True, sampler=SamplerSettings(max_steps=STEPS, progress=False), figures=False)


def _write_map(path: Path, seed: int = 3, e_x: float = 1.545) -> Path:
    """An invented GaAs-like emission map (11 angles x 80 energies) with CCD noise."""
    rng = np.random.default_rng(seed)
    ang = np.linspace(-20.0, 20.0, 11)
    energy = np.linspace(1.530, 1.556, 80)
    phys = dict(e_c0=1.542, n_eff=3.4, e_x=e_x, g=5 * MEV, gamma_c=0.25 * MEV,
                gamma_x=0.6 * MEV)
    peak = float(simulate_map(ang, energy, amplitudes=[1.0, 0.3], **phys).signal.max())
    mean = simulate_map(ang, energy, amplitudes=[2000 / peak, 600 / peak], background=50.0,
                        **phys).signal
    y = rng.poisson(mean) + rng.normal(0.0, 3.0, mean.shape)
    da = make_map(y, angle=ang, energy=energy, units="counts", kind="emission", gain=1.0,
                  read_noise=3.0, sample="invented DS-R")
    files.write_netcdf(path, da)
    return path


@pytest.fixture(scope="module")
def maps(tmp_path_factory) -> tuple[Path, Path]:
    folder = tmp_path_factory.mktemp("maps")
    return _write_map(folder / "p1.nc"), _write_map(folder / "p2.nc", seed=4, e_x=1.5455)


@pytest.fixture(scope="module")
def finished(maps, tmp_path_factory) -> Path:
    """A finished peak-table fit of P1 (its folder holds chains.h5)."""
    out = tmp_path_factory.mktemp("fit") / "p1"
    with pytest.warns(ConvergenceWarning):  # STEPS is below the gate on purpose
        fit_dispersion(maps[0], out=out, seed=SEED, **KW)
    return out


def _chain(checkpoint: Path) -> np.ndarray:
    with h5py.File(checkpoint, "r") as fh:
        g = fh["ensemble0"]
        return g["chain"][: int(g.attrs["iteration"])]


def _cli(capsys, *args: str) -> tuple[int, list[str]]:
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        status = main(list(args))
    err = [ln for ln in capsys.readouterr().err.splitlines() if ln.strip()]
    return status, err


# ----------------------------------------------------------------------------------------
# 1. the fit identity
# ----------------------------------------------------------------------------------------
def test_checkpoint_records_the_fit_identity(finished, maps):
    # common practice, no published source: a checkpoint states what it belongs to
    with h5py.File(finished / "chains.h5", "r") as fh:
        ident = json.loads(fh.attrs["polkit_fit_identity"])
    assert ident["input_sha256"] == files.file_sha256(maps[0])
    assert ident["route"] == "peak_table" and ident["model"] == "two emission"
    assert json.loads(ident["priors"])["rabi_splitting"]["units"] == "meV"
    assert len(ident["priors_sha256"]) == 64
    assert {"polkit_version", "numpy_version", "scipy_version", "emcee_version"} <= set(ident)


@pytest.mark.parametrize("change, field", [
    ("input", "input_sha256"),
    ("priors", "priors_sha256"),
    ("model", "polkit_parameter_names"),
    ("route", "route"),
])
def test_resume_with_another_fit_is_refused_in_one_line(finished, maps, tmp_path, capsys,
                                                        change, field):
    # common practice, no published source: a chain is only continued under the posterior
    # it was sampled from; anything else is refused, naming the field, with exit status 2
    before = (finished / "chains.h5").read_bytes()
    args = ["dispersion", str(maps[0]), "--peaks-only", "--out", str(finished), "--seed",
            str(SEED), "--max-steps", str(STEPS), "--quiet", "--resume"]
    if change == "input":
        args[1] = str(maps[1])
    elif change == "priors":
        priors = tmp_path / "priors.toml"
        priors.write_text('[rabi_splitting]\nprior = "uniform"\nlow = 1\nhigh = 30\n'
                          'units = "meV"\n')
        args += ["--priors", str(priors)]
    elif change == "model":
        args += ["--model", "three"]
    else:
        args.remove("--peaks-only")
    status, err = _cli(capsys, *args)
    assert status == 2
    assert len(err) == 1 and field in err[0] and "chains.h5" in err[0], err
    if change != "model":
        assert "--out" in err[0] and "resume refused" in err[0]
    assert (finished / "chains.h5").read_bytes() == before  # untouched
    assert not (finished / LOCK_FILE).exists()


def test_same_fit_resumes_and_a_patch_release_only_warns(finished, maps, monkeypatch):
    # common practice, no published source: a finished run resumed as it is gives the
    # same chain; a patch-level version change warns, a minor-level change is refused
    ident = dict(json.loads(h5py.File(finished / "chains.h5", "r").attrs[
        "polkit_fit_identity"]))
    from polkit.inference import identity as identity_module

    real = identity_module._version
    patch = {"emcee": ident["emcee_version"] + ".1"}
    monkeypatch.setattr(identity_module, "_version", lambda n: patch.get(n) or real(n))
    with pytest.warns(ConvergenceWarning), pytest.warns(Warning, match="patch release"):
        again = fit_dispersion(maps[0], out=finished, resume=True, seed=SEED, **KW)
    assert again.diagnostics["steps"] == STEPS
    minor = ident["numpy_version"].split(".")
    minor[1] = str(int(minor[1]) + 1)
    patch = {"numpy": ".".join(minor)}
    with pytest.raises(DataError, match="field 'numpy_version' differs"):
        fit_dispersion(maps[0], out=finished, resume=True, seed=SEED, **KW)


# ----------------------------------------------------------------------------------------
# 2. one writer per folder
# ----------------------------------------------------------------------------------------
_HOLDER = ("import sys, time\nfrom polkit.folder_lock import folder_lock\n"
           "with folder_lock(sys.argv[1]):\n    print('held', flush=True)\n"
           "    time.sleep(120)\n")


def test_second_run_into_a_locked_folder_is_refused_and_deletes_nothing(finished, maps,
                                                                      capsys):
    # common practice, no published source: a live run's folder is never written by another
    # run; this must hold with HDF5's own file locking switched off
    before = (finished / "chains.h5").read_bytes()
    env = dict(os.environ, HDF5_USE_FILE_LOCKING="FALSE",
               PYTHONPATH=str(Path(__file__).resolve().parents[2]))
    holder = subprocess.Popen([sys.executable, "-c", _HOLDER, str(finished)],
                              stdout=subprocess.PIPE, text=True, env=env)
    try:
        assert holder.stdout.readline().strip() == "held"
        for extra in ([], ["--resume"]):
            status, err = _cli(capsys, "dispersion", str(maps[0]), "--peaks-only", "--out",
                               str(finished), "--seed", str(SEED), "--max-steps", str(STEPS),
                               "--quiet", *extra)
            assert status == 2 and len(err) == 1, err
            assert "another polkit run is writing into this folder" in err[0]
            assert f"PID {holder.pid}" in err[0] and socket.gethostname() in err[0]
            assert "remove" not in err[0] and "delete" not in err[0]
        assert (finished / "chains.h5").read_bytes() == before
        assert read_lock(finished)["pid"] == holder.pid  # the live run's lock is kept
    finally:
        holder.kill()
        holder.wait()


def test_stale_lock_of_a_dead_process_is_taken_over(tmp_path):
    # common practice, no published source: a lock whose process is gone (same host) is stale
    dead = subprocess.Popen([sys.executable, "-c", "pass"])
    dead.wait()
    (tmp_path / LOCK_FILE).write_text(json.dumps({
        "host": socket.gethostname(), "pid": dead.pid, "started": "2026-01-01T00:00:00+00:00",
        "command": "polkit dispersion x.nc"}))
    with folder_lock(tmp_path) as mine:
        assert read_lock(tmp_path) == mine and mine["pid"] == os.getpid()
        with folder_lock(tmp_path):  # re-entrant in the same thread
            pass
        assert read_lock(tmp_path) == mine
    assert not (tmp_path / LOCK_FILE).exists()


def test_lock_from_another_host_is_reported_and_never_broken(tmp_path):
    # common practice, no published source: processes on another machine cannot be checked
    other = {"host": "invented-node-7", "pid": 4242, "started": "2026-01-01T00:00:00+00:00",
             "command": "polkit survey m.csv"}
    (tmp_path / LOCK_FILE).write_text(json.dumps(other))
    with pytest.raises(FolderLockedError, match="invented-node-7") as info:
        with folder_lock(tmp_path):
            pass
    assert "PID 4242" in str(info.value) and "2026-01-01" in str(info.value)
    assert json.loads((tmp_path / LOCK_FILE).read_text()) == other


# ----------------------------------------------------------------------------------------
# 3. every kill window resumes to the uninterrupted chain
# ----------------------------------------------------------------------------------------
class _Killed(BaseException):
    """Stands in for SIGKILL at a chosen window (only finally blocks run)."""


def _kill_once(monkeypatch, target, name):
    real = getattr(target, name)

    def killed(*args, **kwargs):
        monkeypatch.setattr(target, name, real)
        raise _Killed(name)

    monkeypatch.setattr(target, name, killed)


@pytest.fixture(scope="module")
def straight(maps, tmp_path_factory) -> np.ndarray:
    out = tmp_path_factory.mktemp("straight")
    with pytest.warns(ConvergenceWarning):
        fit_dispersion(maps[0], out=out, seed=SEED, **KW)
    return _chain(out / "chains.h5")


@pytest.mark.parametrize("window", ["creation", "before_first_step", "preburn", "figures"])
def test_a_kill_at_every_window_resumes_to_the_uninterrupted_chain(maps, straight, tmp_path,
                                                                   monkeypatch, window):
    # common practice, no published source: the seed, the starting ensembles and every
    # step are stored before they are needed, so a resumed run repeats the same chain
    out = tmp_path / "run"
    seed = SEED
    if window == "creation":  # the checkpoint is renamed into place whole, or not at all
        _kill_once(monkeypatch, checkpoint_module.os, "replace")
    elif window == "before_first_step":
        from polkit.inference import ensemble

        _kill_once(monkeypatch, ensemble.Ensemble, "advance")
    elif window == "preburn":  # and without a seed: the stored root seed is used again
        seed = None
        _kill_once(monkeypatch, _steps, "run_ensemble")
    else:
        _kill_once(monkeypatch, DispersionFit, "save")
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        with pytest.raises(_Killed):
            fit_dispersion(maps[0], out=out, seed=seed, **KW)
        assert not (out / LOCK_FILE).exists()
        resumed = fit_dispersion(maps[0], out=out, seed=seed, resume=True, **KW)
    chain = _chain(out / "chains.h5")
    if seed is None:  # the reference: an uninterrupted run with the seed stored
        stored = int(json.loads(h5py.File(out / "chains.h5", "r").attrs[
            "polkit_seed_entropy"]))
        with pytest.warns(ConvergenceWarning):
            fit_dispersion(maps[0], out=tmp_path / "ref", seed=stored, **KW)
        np.testing.assert_array_equal(chain, _chain(tmp_path / "ref" / "chains.h5"))
    else:
        np.testing.assert_array_equal(chain, straight)
    assert resumed.diagnostics["steps"] == STEPS
    assert not list(out.glob(".*.new"))  # no half-made checkpoint left beside it


# ----------------------------------------------------------------------------------------
# 4. large maps
# ----------------------------------------------------------------------------------------
def test_a_map_above_the_pixel_limit_warns_with_time_memory_and_binning():
    # value from memory: the limit is set from the measured cost per pixel-step (see
    # polkit/jobs/steps.py); this checks the warning, not the timing
    big = make_map(np.ones((500, 4100)), angle=np.linspace(-20, 20, 500),
                   energy=np.linspace(1.50, 1.60, 4100), units="counts", kind="emission")
    with pytest.warns(Warning, match=r"2,050,000 pixels.*s per step.*GB.*bin_map") as rec:
        assert _steps.warn_large_map(big)
    assert "energy=" in str(rec[0].message)
    small = big.isel(angle=slice(0, 400))
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        assert not _steps.warn_large_map(small)
