"""Faults a long fit must survive: SIGKILL while sampling, SIGKILL while writing results, a full
disk and a read-only output folder.

Every map and result here is invented (simulated from the project's own models with a known
truth and a fixed seed).  Subprocesses stand in for the user's Python session or shell; the
waits in this file are hang guards, never timed assertions.
"""

from __future__ import annotations

import contextlib
import ctypes
import errno
import json
import os
import resource
import signal
import subprocess
import sys
import time
import warnings
from pathlib import Path

import h5py
import numpy as np
import pytest
import xarray as xr

from polkit import files
from polkit.cli import main
from polkit.data import make_map
from polkit.errors import ConvergenceWarning
from polkit.inference import (
    FitResult,
    Parameter,
    ParameterSpace,
    Prior,
    SamplerSettings,
    run_ensemble,
)
from polkit.jobs.dispersion.run import fit_dispersion
from polkit.models.simulate import simulate_map

MEV = 1e-3
SEED = 5
STEPS = 600  # below the 50-tau gate of this peak table: every run stops at exactly STEPS
HANG_GUARD_S = 900.0  # generous: a stuck subprocess fails the test instead of hanging CI
RESULT_FILES = ("posterior.nc", "summary.json")


# ----------------------------------------------------------------------------------------
# helpers
# ----------------------------------------------------------------------------------------
def _write_map(path: Path, seed: int = 3) -> Path:
    """An invented GaAs-like emission map (11 angles x 80 energies) with CCD noise."""
    rng = np.random.default_rng(seed)
    ang = np.linspace(-20.0, 20.0, 11)
    energy = np.linspace(1.530, 1.556, 80)
    phys = dict(e_c0=1.542, n_eff=3.4, e_x=1.545, g=5 * MEV, gamma_c=0.25 * MEV,
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
def map_file(tmp_path_factory) -> Path:
    return _write_map(tmp_path_factory.mktemp("map") / "invented_map.nc")


def _cli(*args: str) -> list[str]:
    return [sys.executable, "-m", "polkit.cli", *args]


def _run_args(map_path: Path, out: Path, *extra: str, cli=_cli) -> list[str]:
    return cli("dispersion", str(map_path), "--peaks-only", "--out", str(out), "--seed",
               str(SEED), "--max-steps", str(STEPS), "--quiet", *extra)


#: the command line with every likelihood call held up by 3 ms, so that a kill at a random
#: moment lands inside sampling however fast the machine; the sleep changes no value
_SLOWED_CLI = (
    "import sys, time\n"
    "from polkit.jobs.dispersion.problem import DispersionProblem as P\n"
    "fast = P.table_log_likelihood\n"
    "P.table_log_likelihood = lambda self, theta: (time.sleep(0.003), fast(self, theta))[1]\n"
    "from polkit.cli import main\n"
    "sys.exit(main(sys.argv[1:]))\n"
)


def _slowed_cli(*args: str) -> list[str]:
    return [sys.executable, "-c", _SLOWED_CLI, *args]


def _stored_chain(checkpoint: Path) -> tuple[np.ndarray, np.ndarray]:
    """Chain and log-probability of every step stored in a checkpoint."""
    with h5py.File(checkpoint, "r") as fh:
        g = fh["ensemble0"]
        n = int(g.attrs["iteration"])
        return g["chain"][:n], g["log_prob"][:n]


def _kill_while_sampling(cmd: list[str], checkpoint: Path, rng: np.random.Generator,
                         cwd: Path) -> int:
    """Start ``cmd``, SIGKILL it a random moment after its checkpoint starts to grow.

    Returns the number of steps the checkpoint holds after the kill.
    """
    log = open(cwd / "killed.log", "ab")  # noqa: SIM115 - closed below
    proc = subprocess.Popen(cmd, cwd=cwd, stdout=log, stderr=log)
    try:
        deadline = time.monotonic() + HANG_GUARD_S
        size0 = None
        while proc.poll() is None and time.monotonic() < deadline:
            if checkpoint.exists():
                size = checkpoint.stat().st_size
                size0 = size if size0 is None else size0
                if size > size0 + 40_000:  # about 20 stored steps after the first write
                    break
            time.sleep(0.02)
        time.sleep(float(rng.uniform(0.0, 1.0)))
        assert proc.poll() is None, "the fit ended before it could be killed; raise STEPS"
        proc.send_signal(signal.SIGKILL)
        proc.wait(timeout=60)
    finally:
        if proc.poll() is None:
            proc.kill()
            proc.wait()
        log.close()
    assert proc.returncode == -signal.SIGKILL
    steps = len(_stored_chain(checkpoint)[0])
    assert 0 < steps < STEPS, f"killed at step {steps}; expected in the middle of sampling"
    return steps


# ----------------------------------------------------------------------------------------
# 1. SIGKILL during sampling, then --resume
# ----------------------------------------------------------------------------------------
def test_fit_killed_while_sampling_resumes_to_the_uninterrupted_chain(map_file, tmp_path):
    # common practice, no published source: an HDF5 checkpoint flushed after every step
    # keeps each finished step through SIGKILL; the run plan and the random state are
    # stored, so the continued chain equals an uninterrupted run with the same seed.
    rng = np.random.default_rng(20260)
    run = tmp_path / "run"
    checkpoint = run / "chains.h5"
    # killed once on the first attempt and once more while resuming (two random moments)
    first = _kill_while_sampling(_run_args(map_file, run, cli=_slowed_cli), checkpoint, rng,
                                 tmp_path)
    chain1, lp1 = _stored_chain(checkpoint)
    second = _kill_while_sampling(_run_args(map_file, run, "--resume", cli=_slowed_cli),
                                  checkpoint, rng, tmp_path)
    chain2, lp2 = _stored_chain(checkpoint)
    assert second >= first
    np.testing.assert_array_equal(chain2[:first], chain1)  # nothing written was lost
    np.testing.assert_array_equal(lp2[:first], lp1)
    assert not any((run / name).exists() for name in RESULT_FILES), "no result before the end"

    kw = dict(peaks_only=True, seed=SEED, sampler=SamplerSettings(max_steps=STEPS, progress=False),
              figures=False)
    with pytest.warns(ConvergenceWarning):  # STEPS is below the gate on purpose
        resumed = fit_dispersion(map_file, out=run, resume=True, **kw)
    with pytest.warns(ConvergenceWarning):
        straight = fit_dispersion(map_file, out=tmp_path / "straight", **kw)

    final, final_lp = _stored_chain(checkpoint)
    assert len(final) == STEPS
    np.testing.assert_array_equal(final[:second], chain2)  # every step before the 2nd kill
    reference, reference_lp = _stored_chain(tmp_path / "straight" / "chains.h5")
    np.testing.assert_array_equal(final, reference)  # bit-identical to the uninterrupted run
    np.testing.assert_array_equal(final_lp, reference_lp)
    assert resumed.summary()["parameters"] == straight.summary()["parameters"]
    again = FitResult.load(run)
    for name in resumed.summary()["parameters"]:
        np.testing.assert_array_equal(again.draws(name), straight.draws(name))


# ----------------------------------------------------------------------------------------
# 2. SIGKILL while writing results
# ----------------------------------------------------------------------------------------
_WRITER = r"""
import sys
from pathlib import Path

import matplotlib
matplotlib.use("Agg")
import matplotlib.pyplot as plt
import numpy as np
import xarray as xr

from polkit import files

folder = Path(sys.argv[1])
version = int(sys.argv[2])
fig, ax = plt.subplots(figsize=(3, 2))
ax.plot(np.linspace(0, 1, 50) ** 2)
while True:
    version += 1
    files.write_json(folder / "summary.json",
                  {"version": version, "values": list(range(4000)), "complete": True})
    files.write_netcdf(folder / "posterior.nc", xr.Dataset(
        {"x": ("draw", np.full(30000, float(version)), {"units": "meV"})},
        attrs={"version": version}))
    ax.set_title(f"version {version}")
    files.save_figure(folder / "fit.png", fig)
    files.write_text(folder / "table.txt",
                  "".join(f"row {k} version {version}\n" for k in range(3000)) + "end\n")
    if version == int(sys.argv[2]) + 1:
        print("ready", flush=True)
"""


def _check_complete(folder: Path) -> dict[str, int]:
    """Parse every target fully; return the version each one holds."""
    import matplotlib.image

    versions = {}
    s = json.loads((folder / "summary.json").read_text())
    assert s["complete"] is True and s["values"] == list(range(4000))
    versions["summary.json"] = s["version"]
    with xr.open_dataset(folder / "posterior.nc", engine="h5netcdf") as ds:
        x = ds["x"].values
        v = int(ds.attrs["version"])
    assert x.shape == (30000,) and np.all(x == v)
    versions["posterior.nc"] = v
    img = matplotlib.image.imread(folder / "fit.png")  # decodes every chunk of the PNG
    assert img.ndim == 3 and img.shape[0] > 10
    lines = (folder / "table.txt").read_text().splitlines()
    assert len(lines) == 3001 and lines[-1] == "end"
    assert len({ln.split()[-1] for ln in lines[:-1]}) == 1  # one version throughout
    versions["table.txt"] = int(lines[0].split()[-1])
    return versions


def test_results_killed_mid_write_are_old_or_new_never_truncated(tmp_path):
    # common practice, no published source: temp file in the same folder, fsync, rename --
    # a reader sees the complete old file or the complete new one.
    rng = np.random.default_rng(7)
    folder = tmp_path / "results"
    folder.mkdir()
    script = tmp_path / "writer.py"
    script.write_text(_WRITER)
    version = 0
    seen = set()
    for _ in range(5):
        proc = subprocess.Popen([sys.executable, str(script), str(folder), str(version)],
                                stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
        try:
            line = proc.stdout.readline()  # one full round written: the loop is running
            assert line.strip() == "ready", proc.stderr.read()
            time.sleep(float(rng.uniform(0.0, 0.5)))
            proc.send_signal(signal.SIGKILL)
            proc.wait(timeout=60)
        finally:
            if proc.poll() is None:
                proc.kill()
                proc.wait()
            proc.stdout.close()
            proc.stderr.close()
        versions = _check_complete(folder)
        seen.update(versions.values())
        version = max(versions.values())
        # each writer removes what the killed ones left of its targets: at most the one
        # temporary file of the last kill remains
        assert len(list(folder.glob(".*.part"))) <= 1
    assert len(seen) > 3, "the writer made progress between kills"
    for name in ("summary.json", "table.txt", "posterior.nc", "fit.png"):
        files.write_bytes(folder / name, (folder / name).read_bytes())
    assert sorted(p.name for p in folder.iterdir()) == sorted(
        ["summary.json", "table.txt", "posterior.nc", "fit.png"])


def test_a_write_that_fails_leaves_no_temporary_file_and_keeps_permissions(tmp_path):
    # common practice, no published source: new files get 0666 less the umask (as open()
    # would), a replaced file keeps its mode, and a failed write removes its temporary file
    new = files.write_text(tmp_path / "new.txt", "x")
    mask = os.umask(0o022)
    os.umask(mask)
    assert (new.stat().st_mode & 0o777) == 0o666 & ~mask
    new.chmod(0o640)
    files.write_text(new, "y")
    assert (new.stat().st_mode & 0o777) == 0o640 and new.read_text() == "y"

    # a library writer (HDF5) that reports a full disk inside a RuntimeError, half-way
    hdf5_message = ("Can't write data (file write failed: time = ..., filename = 'x', "
                    "errno = 28, error message = 'No space left on device', buf = ...)")
    with pytest.raises(OSError, match=r"cannot write .*new\.txt: No space left on device; "
                       r"the disk is full") as info:
        with files.atomic_path(new) as tmp:
            tmp.write_bytes(b"half")
            raise RuntimeError(hdf5_message)
    assert info.value.errno == errno.ENOSPC
    assert new.read_text() == "y"
    assert sorted(p.name for p in tmp_path.iterdir()) == ["new.txt"]


# ----------------------------------------------------------------------------------------
# 3. a full disk
# ----------------------------------------------------------------------------------------
def _toy_result(seed: int) -> FitResult:
    """A small result of an invented straight-line problem (for write tests only)."""
    space = ParameterSpace([Parameter("a", "meV", Prior.normal(0.0, 1.0)),
                            Parameter("b", "meV", Prior.normal(0.0, 1.0))])

    def loglike(theta):
        return -0.5 * np.sum(theta**2, axis=1)

    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)
        run = SamplerSettings(n_walkers=8, max_steps=80, min_steps=80, check_every=40,
                              progress=False)
        out = run_ensemble(loglike, space, np.zeros(2), run, seed=seed)
    return FitResult.from_samples(out, space, model="toy", kind="test",
                                  provenance={"input_sha256": f"{seed:064d}"})


def _limit_file_size(limit: int):
    def apply():
        signal.signal(signal.SIGXFSZ, signal.SIG_IGN)  # writes then fail with EFBIG
        resource.setrlimit(resource.RLIMIT_FSIZE, (limit, limit))

    return apply


def _snapshot(folder: Path) -> dict[str, bytes]:
    return {p.name: p.read_bytes() for p in sorted(folder.iterdir()) if p.is_file()}


_SAVE_AGAIN = r"""
import sys
from polkit.inference import FitResult
try:
    FitResult.load(sys.argv[1]).save(sys.argv[2])
except OSError as exc:
    print(exc)
    sys.exit(1)
"""


def test_full_disk_while_saving_a_result_gives_a_clear_error_and_keeps_the_old(tmp_path):
    # common practice, no published source: RLIMIT_FSIZE with SIGXFSZ ignored makes every
    # write past the limit fail with EFBIG, as a full disk fails with ENOSPC.
    old, new = tmp_path / "old", tmp_path / "new"
    _toy_result(1).save(old)
    _toy_result(2).save(new)
    before = _snapshot(old)
    proc = subprocess.run([sys.executable, "-c", _SAVE_AGAIN, str(new), str(old)],
                          preexec_fn=_limit_file_size(4096), capture_output=True, text=True,
                          timeout=HANG_GUARD_S)
    assert proc.returncode == 1, proc.stderr
    message = proc.stdout.strip()
    assert "cannot write" in message and "posterior.nc" in message
    assert "File too large" in message and "free some space" in message
    assert "Traceback" not in proc.stderr
    assert _snapshot(old) == before, "existing results were touched"


def test_full_disk_during_a_fit_gives_one_clear_line_and_keeps_old_results(map_file, tmp_path):
    # common practice, no published source: the sampler checks the room left before each
    # stretch of steps and stops before h5py meets the limit; after room is made, --resume
    # continues the steps stored so far
    out = tmp_path / "fit"
    _toy_result(4).save(out)  # results of an earlier fit in the same folder
    before = {n: (out / n).read_bytes() for n in RESULT_FILES}
    # 600 kB: the empty checkpoint and the first 100 steps fit, the next stretch does not
    proc = subprocess.run(_run_args(map_file, out), preexec_fn=_limit_file_size(600_000),
                          capture_output=True, text=True, timeout=HANG_GUARD_S)
    lines = [ln for ln in proc.stderr.splitlines() if ln.strip()]
    assert {n: (out / n).read_bytes() for n in RESULT_FILES} == before
    assert proc.returncode == 1, proc.stderr[-2000:]
    assert len(lines) == 1 and lines[0].startswith("polkit: error:"), proc.stderr[-2000:]
    assert f"cannot write {out / 'chains.h5'}: File too large" in lines[0]
    assert "ulimit -f" in lines[0] and "--resume" in lines[0]
    assert sorted(p.name for p in out.iterdir()) == sorted([*RESULT_FILES, "chains.h5",
                                                            "quick_summary.json"])
    stored, stored_lp = _stored_chain(out / "chains.h5")  # readable
    assert 0 < len(stored) < STEPS

    # room made (no limit): resuming (what --resume does) continues the stored steps, here
    # to 200 steps and without figures to keep the test short; test_sampler_disk.py checks
    # a resumed chain against an uninterrupted one bit for bit
    with pytest.warns(ConvergenceWarning):  # 200 steps are below the gate on purpose
        fit_dispersion(map_file, out=out, resume=True, peaks_only=True, seed=SEED,
                       sampler=SamplerSettings(max_steps=200, progress=False), figures=False)
    final, final_lp = _stored_chain(out / "chains.h5")
    assert len(final) == 200
    np.testing.assert_array_equal(final[: len(stored)], stored)
    np.testing.assert_array_equal(final_lp[: len(stored)], stored_lp)
    assert json.loads((out / "summary.json").read_text())["diagnostics"]["steps"] == 200


def test_cli_reports_a_full_disk_at_result_time_in_one_line(map_file, tmp_path, monkeypatch,
                                                           capsys):
    # common practice, no published source: the disk fills up when the results are written
    out = tmp_path / "fit"
    _toy_result(3).save(out)
    before = _snapshot(out)

    def no_space(*args, **kwargs):
        raise OSError(errno.ENOSPC, os.strerror(errno.ENOSPC))

    monkeypatch.setattr(files.tempfile, "mkstemp", no_space)
    with warnings.catch_warnings():  # the short run does not converge: printed, not raised
        warnings.simplefilter("default", ConvergenceWarning)
        status = main(["dispersion", str(map_file), "--peaks-only", "--out", str(out),
                       "--seed", "1", "--max-steps", "60", "--quiet"])
    err = capsys.readouterr().err
    lines = [ln for ln in err.splitlines() if ln.startswith("polkit: error:")]
    assert status == 1
    assert len(lines) == 1 and "cannot write" in lines[0] and "posterior.nc" in lines[0]
    assert "No space left on device" in lines[0] and "Traceback" not in err
    now = _snapshot(out)
    assert {k: now[k] for k in before} == before, "existing results were touched"


# ----------------------------------------------------------------------------------------
# 4. a read-only output folder
# ----------------------------------------------------------------------------------------
_CAPS_THAT_BYPASS_PERMISSIONS = (1, 2, 3)  # CAP_DAC_OVERRIDE, CAP_DAC_READ_SEARCH, CAP_FOWNER
_PR_CAPBSET_DROP = 24  # linux/prctl.h


def _as_ordinary_user():
    """preexec_fn: as root, drop the capabilities that ignore file permissions.

    Root writes into a chmod 0555 folder because of CAP_DAC_OVERRIDE; removing it (and its
    two siblings) from the bounding set before exec makes the child obey permissions like
    any user, while it can still run the interpreter installed under root's home.
    """
    if os.geteuid() != 0:
        return
    libc = ctypes.CDLL(None, use_errno=True)
    for cap in _CAPS_THAT_BYPASS_PERMISSIONS:
        if libc.prctl(_PR_CAPBSET_DROP, cap, 0, 0, 0) != 0:
            raise OSError(ctypes.get_errno(), "prctl(PR_CAPBSET_DROP) refused")


def _can_drop_capabilities() -> bool:
    if os.geteuid() != 0:
        return True
    probe = subprocess.run([sys.executable, "-c", "pass"], preexec_fn=_as_ordinary_user,
                           capture_output=True, timeout=120)
    return probe.returncode == 0


@contextlib.contextmanager
def _read_only_folder(parent: Path):
    folder = parent / "read_only"
    folder.mkdir()
    (folder / "summary.json").write_text('{"old": true}\n')
    folder.chmod(0o555)
    try:
        yield folder
    finally:
        folder.chmod(0o755)


@pytest.mark.skipif(sys.platform != "linux", reason="capability bounding set is Linux-only")
def test_read_only_output_folder_gives_a_clear_error_and_keeps_old_results(map_file,
                                                                          tmp_path):
    # common practice, no published source
    if not _can_drop_capabilities():
        pytest.skip("running as root without CAP_SETPCAP: cannot make a folder read-only")
    with _read_only_folder(tmp_path) as folder:
        code = "from polkit import files; files.write_json(__import__('sys').argv[1], {'new': 1})"
        proc = subprocess.run([sys.executable, "-c", code, str(folder / "summary.json")],
                              preexec_fn=_as_ordinary_user, capture_output=True, text=True,
                              timeout=HANG_GUARD_S)
        assert proc.returncode != 0
        last = proc.stderr.strip().splitlines()[-1]
        assert last.startswith("PermissionError")
        assert "cannot write" in last and "summary.json" in last and "read-only" in last
        # the command line: one line naming the file, exit status 1 (a write error)
        proc = subprocess.run(_run_args(map_file, folder), preexec_fn=_as_ordinary_user,
                              capture_output=True, text=True, timeout=HANG_GUARD_S)
        lines = [ln for ln in proc.stderr.splitlines() if ln.strip()]
        assert proc.returncode == 1, proc.stderr[-2000:]
        assert len(lines) == 1 and lines[0].startswith("polkit: error:"), proc.stderr
        assert str(folder) in lines[0] and "Permission denied" in lines[0]
        assert (folder / "summary.json").read_text() == '{"old": true}\n'
        assert sorted(p.name for p in folder.iterdir()) == ["summary.json"]


@pytest.mark.parametrize("where", ["temporary file", "rename"])
def test_permission_refused_is_reported_and_the_old_file_kept(tmp_path, monkeypatch, where):
    # common practice, no published source: what a non-root user meets in a read-only
    # folder, simulated (a PermissionError when the temporary file is created, or when it
    # is renamed onto the target)
    target = tmp_path / "summary.json"
    target.write_text('{"old": true}\n')

    def refuse(*args, **kwargs):
        raise PermissionError(errno.EACCES, os.strerror(errno.EACCES))

    if where == "temporary file":
        monkeypatch.setattr(files.tempfile, "mkstemp", refuse)
    else:
        monkeypatch.setattr(files.os, "replace", refuse)
    with pytest.raises(PermissionError, match=r"cannot write .*summary\.json: Permission "
                       r"denied; the folder .* is read-only .*: choose another output "
                       r"folder") as info:
        files.write_json(target, {"new": 1})
    message = str(info.value)
    assert f"the folder {tmp_path} is read-only" in message  # names the folder
    assert "\n" not in message and "[Errno" not in message  # one clean line
    assert info.value.errno == errno.EACCES
    assert target.read_text() == '{"old": true}\n'
    assert sorted(p.name for p in tmp_path.iterdir()) == ["summary.json"]


# ----------------------------------------------------------------------------------------
# 5. temporary files left by a killed writer
# ----------------------------------------------------------------------------------------
_HOLD_TEMPORARIES = r"""
import sys, time
from pathlib import Path
from polkit import files

folder = Path(sys.argv[1])
with files.atomic_path(folder / "summary.json") as a, files.atomic_path(folder / "table.txt") as b:
    a.write_bytes(b"half of a summary")
    b.write_bytes(b"half of a table")
    print(a.name, b.name, flush=True)
    time.sleep(600)  # killed long before
"""


def _start_holder(folder: Path) -> tuple[subprocess.Popen, list[str]]:
    proc = subprocess.Popen([sys.executable, "-c", _HOLD_TEMPORARIES, str(folder)],
                            stdout=subprocess.PIPE, stderr=subprocess.PIPE, text=True)
    line = proc.stdout.readline()
    assert line.strip(), proc.stderr.read()
    return proc, line.split()


def _kill(proc: subprocess.Popen) -> None:
    proc.send_signal(signal.SIGKILL)
    proc.wait(timeout=60)
    proc.stdout.close()
    proc.stderr.close()


def test_next_write_removes_temporary_files_of_killed_writers_only(tmp_path):
    # common practice, no published source: a writer killed with SIGKILL cannot clean up;
    # the next write of the same target removes the temporary files it can prove are dead
    # (made on this host by a process that no longer exists, or made on another host and
    # untouched for a day) and nothing else
    folder = tmp_path / "results"
    folder.mkdir()
    (folder / "summary.json").write_text('{"old": true}\n')
    # the running writer starts first: a writer that starts later cleans up on its own
    running, (running_summary, running_table) = _start_holder(folder)
    try:
        killed, (killed_summary, killed_table) = _start_holder(folder)
        _kill(killed)
        decoys = [
            ".summary.json.notes.part",  # not a temporary file name of polkit
            "summary.json.somehost-1.abcdefgh.part",  # no leading dot
            ".summary.json.somehost-1.ABCDEFGH.part",  # mkstemp never uses capitals
            ".summary.json.otherhost-4242.abcdefgh.part",  # another host, recent
            ".other.json.otherhost-4242.abcdefgh.part",  # another target
        ]
        for name in decoys:
            (folder / name).write_text("not ours to remove")
        old = folder / ".summary.json.otherhost-4243.abcd_fgh.part"
        old.write_text("left two days ago on another host")
        two_days_ago = time.time() - 2 * files.STALE_AGE_S
        os.utime(old, (two_days_ago, two_days_ago))
        assert (folder / killed_summary).exists() and (folder / killed_table).exists()

        files.write_json(folder / "summary.json", {"new": True})

        assert json.loads((folder / "summary.json").read_text()) == {"new": True}
        assert not (folder / killed_summary).exists()  # its writer is dead
        assert not old.exists()  # another host's, a day untouched
        assert (folder / killed_table).exists()  # another target's: left to its own writer
        assert (folder / running_summary).exists()  # its writer is still running
        assert (folder / running_table).exists()
        assert all((folder / name).exists() for name in decoys)

        files.write_text(folder / "table.txt", "rows\n")
        assert not (folder / killed_table).exists()
        assert (folder / running_table).exists()
    finally:
        _kill(running)
    # nothing else was created or removed (the running writer's files stay: killed last)
    assert {p.name for p in folder.iterdir()} == {
        "summary.json", "table.txt", *decoys, running_summary, running_table}


def test_checkpoint_of_another_run_is_refused_not_overwritten(map_file, tmp_path):
    # common practice, no published source: --resume on a checkpoint of different settings
    # is refused with the key named and the file kept
    out = tmp_path / "fit"
    out.mkdir()
    with h5py.File(out / "chains.h5", "w") as fh:
        fh.attrs["polkit_parameter_names"] = json.dumps(["a", "b"])
    before = (out / "chains.h5").read_bytes()
    proc = subprocess.run(_run_args(map_file, out, "--resume"), capture_output=True,
                          text=True, timeout=HANG_GUARD_S)
    lines = [ln for ln in proc.stderr.splitlines() if ln.strip()]
    assert proc.returncode == 2
    assert len(lines) == 1 and "polkit_parameter_names" in lines[0] and "chains.h5" in lines[0]
    assert (out / "chains.h5").read_bytes() == before

