"""A checkpoint that runs out of room: a full disk or a file-size limit while sampling.

The sampler checks the free space and the file-size limit before each stretch of steps and
again before each stored step, and stops with one clear :class:`OSError` before h5py is
asked to write what cannot fit; the steps stored so far stay readable, and a resumed run
continues them to the chain an uninterrupted run gives.

The limits here are real: a subprocess lowers its own ``RLIMIT_FSIZE`` (with ``SIGXFSZ``
ignored, so writes past it fail with EFBIG, as writes to a full disk fail with ENOSPC).
Where a real condition cannot be made in a test (a full file system, a read-only folder
for a non-root user), it is simulated and the test says so.  The posterior is an invented
toy (independent normals).
"""

from __future__ import annotations

import errno
import json
import re
import subprocess
import sys
import warnings
from pathlib import Path

import h5py
import numpy as np
import pytest

from polkit import files
from polkit.errors import ConvergenceWarning, FitError
from polkit.inference import checkpoint as checkpoint_module

HANG_GUARD_S = 600.0  # a stuck subprocess fails the test instead of hanging CI

# the invented toy problem, shared verbatim by this process and the subprocesses
TOY = r'''
import numpy as np
from polkit.inference import Parameter, ParameterSpace, Prior, run_ensemble

SPACE = ParameterSpace([Parameter(f"p{i}", "meV", Prior.normal(0.0, 1.0)) for i in range(6)])
# 32 walkers x 6 parameters: the chain is stored in chunks of 42 steps (64 kB), so the checkpoint
# grows in several jumps within the run
SETTINGS = dict(n_walkers=32, max_steps=260, min_steps=260, check_every=40, progress=False)


def loglike(theta):
    chi2 = np.sum(theta**2, axis=1)
    return -0.5 * chi2, 0.5 * chi2[:, None]


def run(checkpoint=None, resume=False, like=loglike):
    return run_ensemble(like, SPACE, np.zeros(6), SETTINGS, seed=11, checkpoint=checkpoint,
                        resume=resume, log_prob_extras={"half_chi2": "1"})
'''
toy: dict = {}
exec(compile(TOY, "toy_problem", "exec"), toy)  # noqa: S102 - our own source text above
STEPS = toy["SETTINGS"]["max_steps"]
CHECK_EVERY = toy["SETTINGS"]["check_every"]

_DRIVER = r'''
import json, os, resource, signal, sys, warnings
from pathlib import Path

signal.signal(signal.SIGXFSZ, signal.SIG_IGN)  # writes past the limit fail with EFBIG
warnings.simplefilter("ignore")
soft, hard = resource.getrlimit(resource.RLIMIT_FSIZE)
folder, mode, limits = Path(sys.argv[1]), sys.argv[2], json.loads(sys.argv[3])
report = []
for i, limit in enumerate(limits):
    checkpoint = folder / f"run{i}" / "chains.h5"
    like = loglike
    if mode == "fixed":
        resource.setrlimit(resource.RLIMIT_FSIZE, (limit, hard))
    else:  # "mid-stretch": the room runs out between two checks, after `limit` calls
        calls = [0]

        def like(theta, _calls=calls, _stop=limit, _path=checkpoint):
            _calls[0] += 1
            if _calls[0] == _stop:  # only one byte left beyond what is stored
                size = _path.stat().st_size
                resource.setrlimit(resource.RLIMIT_FSIZE, (size + 1, hard))
            return loglike(theta)
    try:
        run(checkpoint, like=like)
        report.append({"done": True})
    except OSError as exc:
        report.append({"errno": exc.errno, "message": str(exc), "type": type(exc).__name__})
    finally:
        resource.setrlimit(resource.RLIMIT_FSIZE, (soft, hard))
print(json.dumps(report))
'''


def _drive(folder: Path, mode: str, limits: list[int]) -> list[dict]:
    proc = subprocess.run([sys.executable, "-c", TOY + _DRIVER, str(folder), mode,
                           json.dumps(limits)], capture_output=True, text=True,
                          timeout=HANG_GUARD_S)
    assert proc.returncode == 0, proc.stderr[-3000:]
    assert "Traceback" not in proc.stderr and "HDF5" not in proc.stderr, proc.stderr[-3000:]
    return json.loads(proc.stdout.strip().splitlines()[-1])


def _stored(checkpoint: Path) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Chain, log-prob and extras of every step stored in a checkpoint (readable or fail)."""
    with h5py.File(checkpoint, "r") as fh:
        if "ensemble0" not in fh:
            return np.empty((0,)), np.empty((0,)), np.empty((0,))
        g = fh["ensemble0"]
        n = int(g.attrs["iteration"])
        blobs = g["blobs"][:n] if "blobs" in g else np.empty((0,))
        return g["chain"][:n], g["log_prob"][:n], np.asarray(blobs)


def _quietly(fn, *args, **kwargs):
    with warnings.catch_warnings():
        warnings.simplefilter("ignore", ConvergenceWarning)  # a fixed short run, on purpose
        return fn(*args, **kwargs)


@pytest.fixture(scope="module")
def reference(tmp_path_factory):
    """The uninterrupted run: in memory, and checkpointed (its file size scales the limits)."""
    folder = tmp_path_factory.mktemp("reference")
    memory = _quietly(toy["run"])
    _quietly(toy["run"], folder / "chains.h5")
    return memory, (folder / "chains.h5").stat().st_size


def _assert_resumes_to_reference(checkpoint: Path, reference_output) -> None:
    # common practice, no published source: the stored steps are a prefix of the
    # uninterrupted chain, and resuming them gives that chain bit for bit
    chain, lp, _ = _stored(checkpoint)
    n = len(chain)
    np.testing.assert_array_equal(chain, reference_output.chains[0, :n])
    np.testing.assert_array_equal(lp, reference_output.log_prob[0, :n])
    resumed = _quietly(toy["run"], checkpoint, resume=True)
    np.testing.assert_array_equal(resumed.chains, reference_output.chains)
    np.testing.assert_array_equal(resumed.log_prob, reference_output.log_prob)
    np.testing.assert_array_equal(resumed.extras["half_chi2"],
                                  reference_output.extras["half_chi2"])


def test_a_file_size_limit_stops_cleanly_at_a_stretch_and_the_run_resumes(tmp_path,
                                                                          reference):
    # common practice, no published source: RLIMIT_FSIZE with SIGXFSZ ignored makes writes
    # past it fail as a full disk does.  A sweep of limits from below the empty checkpoint
    # to above the finished one: each run either finishes or stops with the clear error
    # before h5py meets the limit (a failed h5py write would print HDF5's error stack or
    # crash the subprocess, which _drive refuses).
    memory, full_size = reference
    limits = [int(full_size * f) for f in (0.02, 0.3, 0.55, 0.8, 1.5)]
    report = _drive(tmp_path, "fixed", limits)
    stopped_with_steps = 0
    for i, outcome in enumerate(report):
        checkpoint = tmp_path / f"run{i}" / "chains.h5"
        if outcome.get("done"):
            assert limits[i] >= full_size * 0.85, f"limit {limits[i]} should not fit the run"
            np.testing.assert_array_equal(_stored(checkpoint)[0], memory.chains[0])
            continue
        message = outcome["message"]
        assert outcome["errno"] == errno.EFBIG
        assert message.startswith(f"cannot write {checkpoint}: File too large (about ")
        assert "ulimit -f" in message and "\n" not in message
        if not checkpoint.exists():  # not even an empty checkpoint fitted
            assert "needed for a new checkpoint" in message
            continue
        assert re.search(r"needed for the next (40|20) MCMC steps", message)  # 260 = 6 x 40 + 20
        assert "resume=True" in message
        n = len(_stored(checkpoint)[0])
        assert n % CHECK_EVERY == 0 and n < STEPS, f"stopped at step {n}, not a stretch end"
        stopped_with_steps += n > 0
        _assert_resumes_to_reference(checkpoint, memory)
    assert report[-1].get("done"), "a limit above the finished file must not stop the run"
    assert not report[0].get("done") and not (tmp_path / "run0" / "chains.h5").exists()
    assert stopped_with_steps >= 2, f"the sweep should stop some runs mid-way: {report}"


def test_room_running_out_within_a_stretch_stops_before_the_next_step(tmp_path, reference):
    # common practice, no published source: another program fills the disk while the
    # sampler is inside a stretch; the check before each stored step stops cleanly there
    memory, _ = reference
    # log-likelihood calls: 1 for the start, then 2 per step (DE move: red and blue halves)
    # or 4 (snooker move: four subsets), see polkit.inference.sampler.default_moves
    calls = [41, 121]
    report = _drive(tmp_path, "mid-stretch", calls)
    for i, outcome in enumerate(report):
        checkpoint = tmp_path / f"run{i}" / "chains.h5"
        assert outcome.get("errno") == errno.EFBIG, outcome
        assert "the next MCMC step" in outcome["message"]
        assert str(checkpoint) in outcome["message"]
        n = len(_stored(checkpoint)[0])
        assert 0 < n < STEPS and n % CHECK_EVERY != 0, f"stopped at {n}: not mid-stretch"
        assert (calls[i] - 1) // 4 <= n <= (calls[i] - 1) // 2, f"{n} steps, {calls[i]} calls"
        _assert_resumes_to_reference(checkpoint, memory)


def test_too_little_free_space_stops_before_the_stretch(tmp_path, monkeypatch, reference):
    # simulated: a real full file system cannot be made in a test without mounting one;
    # the free space reported to polkit is cut to 50 kB once 80 steps are stored
    memory, _ = reference
    checkpoint = tmp_path / "chains.h5"
    real_usage = files.shutil.disk_usage

    def usage(folder):
        total, used, free = real_usage(folder)
        stored = len(_stored(checkpoint)[0]) if checkpoint.exists() else 0
        return type(real_usage(folder))(total, used, 50_000 if stored >= 80 else free)

    monkeypatch.setattr(files.shutil, "disk_usage", usage)
    with pytest.raises(OSError, match=r"cannot write .*chains\.h5: No space left on device "
                       r"\(about .* needed for the next 40 MCMC steps, only 50\.0 kB free "
                       r"on its file system\): make room .*resume=True") as info:
        _quietly(toy["run"], checkpoint)
    assert info.value.errno == errno.ENOSPC
    assert len(_stored(checkpoint)[0]) == 80
    monkeypatch.setattr(files.shutil, "disk_usage", real_usage)  # space freed
    _assert_resumes_to_reference(checkpoint, memory)


# recorded from h5py 3.16 / HDF5 2.0 (what h5py raises when a write or a file creation fails)
_HDF5_NO_SPACE = ("Can't synchronously write data (file write failed: time = ..., filename = "
                  "'chains.h5', file descriptor = 3, errno = 28, error message = 'No space "
                  "left on device', buf = 0x1, total write size = 16320, bytes this sub-write "
                  "= 16320, offset = 100000)")
_HDF5_READ_ONLY = ("Unable to synchronously create file (unable to open file: name = "
                   "'chains.h5', errno = 13, error message = 'Permission denied', flags = 13, "
                   "o_flags = 242)")


@pytest.mark.parametrize("raised", [OSError(errno.ENOSPC, _HDF5_NO_SPACE),
                                    RuntimeError(_HDF5_NO_SPACE)])
def test_a_failed_hdf5_write_becomes_one_clear_error(tmp_path, raised):
    # common practice, no published source: the text h5py gives (simulated here: a real
    # failure half-way through a step cannot be produced reliably) becomes one line naming
    # the checkpoint, the problem and the way on
    checkpoint = tmp_path / "chains.h5"
    with pytest.raises(OSError) as info:
        with checkpoint_module.Checkpoint(checkpoint).writes():
            raise raised
    message = str(info.value)
    assert info.value.errno == errno.ENOSPC
    assert message.startswith(f"cannot write {checkpoint}: No space left on device; ")
    assert "resume=True" in message and "start afresh" in message
    assert "synchronously" not in message and "\n" not in message


@pytest.mark.parametrize("raised", [FitError("NaN log-likelihood at a = 1"),
                                    RuntimeError("emcee: not an I/O problem"),
                                    KeyError("ensemble0")])
def test_errors_that_are_not_io_pass_through_unchanged(tmp_path, raised):
    # common practice, no published source: only I/O failures are rewritten
    with pytest.raises(type(raised)) as info:
        with checkpoint_module.Checkpoint(tmp_path / "chains.h5").writes():
            raise raised
    assert info.value is raised


def test_read_only_folder_for_the_checkpoint_names_the_folder(tmp_path, monkeypatch):
    # simulated: as root, chmod does not stop writes, so the error HDF5 gives an ordinary
    # user in a read-only folder (recorded above) is raised when the checkpoint is created
    import h5py as h5py_module

    folder = tmp_path / "results"
    folder.mkdir()

    def refuse(*args, **kwargs):
        raise OSError(errno.EACCES, _HDF5_READ_ONLY)

    monkeypatch.setattr(h5py_module, "File", refuse)
    with pytest.raises(PermissionError) as info:
        toy["run"](folder / "chains.h5")
    message = str(info.value)
    assert message == (f"cannot write {folder / 'chains.h5'}: Permission denied; the folder "
                       f"{folder} is read-only for this user: choose another output folder or "
                       "make this one writable")
    assert list(folder.iterdir()) == []


@pytest.mark.parametrize(("rows", "row_bytes", "start", "stop", "expected"), [
    (128, 1000, 0, 1, 1000),      # the first step allocates a whole chunk row
    (128, 1000, 1, 128, 0),       # the rest of that row is already allocated
    (128, 1000, 127, 129, 1000),  # crossing into the next row
    (128, 1000, 100, 500, 3000),  # rows 1, 2, 3 (row 0 already holds step 100)
    (128, 1000, 128, 256, 1000),
])
def test_chunk_rows_count_whole_chunks(rows, row_bytes, start, stop, expected):
    # Source: HDF5 User's Guide, chunked storage -- a chunk is allocated whole when first
    # written (incremental allocation, the default for chunked datasets without filters)
    assert checkpoint_module.ChunkRows(rows, row_bytes).new_bytes(start, stop) == expected
