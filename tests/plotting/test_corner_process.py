"""The corner-plot process of the ``polkit`` command: same figure, and a safe fallback.

The draws are invented (a correlated Gaussian); the reference is the same corner plot
drawn in this process.
"""

from __future__ import annotations

import signal

import matplotlib.image
import numpy as np
import pytest

from polkit import files
from polkit.plotting import base as _mpl
from polkit.plotting.corner_process import CornerProcess

LABELS = ["exciton_energy\n[eV]", "rabi_splitting\n[meV]", "n_eff"]


@pytest.fixture(scope="module")
def draws() -> np.ndarray:
    rng = np.random.default_rng(8)
    cov = np.array([[1.0, 0.6, 0.1], [0.6, 1.0, -0.3], [0.1, -0.3, 1.0]])
    return rng.multivariate_normal([1.545, 12.0, 3.4], 1e-4 * cov, size=4000)


def _started() -> CornerProcess:
    proc = CornerProcess.start()
    if proc is None:
        pytest.skip("one usable core: the command draws the corner plot itself")
    return proc


def test_the_process_draws_the_same_corner_plot(tmp_path, draws):
    # common practice, no published source: the figure must not depend on where it is drawn
    with _started() as proc:
        assert proc.submit(tmp_path / "corner.png", draws, LABELS)
        assert proc.result() == tmp_path / "corner.png"
    fig = _mpl.corner_figure(draws, LABELS)
    files.save_figure(tmp_path / "here.png", fig)
    _mpl.pyplot().close(fig)
    there = matplotlib.image.imread(tmp_path / "corner.png")
    here = matplotlib.image.imread(tmp_path / "here.png")
    np.testing.assert_array_equal(there, here)


def test_a_dead_process_is_reported_so_the_caller_draws_the_plot(tmp_path, draws):
    # common practice, no published source: a failure of the helper process never loses
    # a figure: submit or result says so, and the caller draws the plot itself
    proc = _started()
    proc._proc.terminate()
    proc._proc.wait(60)
    taken = proc.submit(tmp_path / "corner.png", draws, LABELS)
    assert not taken or proc.result() is None
    proc.close()
    assert not (tmp_path / "corner.png").exists()


def test_a_drawing_error_in_the_process_is_not_raised_there(tmp_path, draws):
    # common practice, no published source: an error while drawing (here: the target is
    # a folder) comes back as "not drawn"; the caller's own attempt then raises it the
    # usual way
    target = tmp_path / "corner_folder.png"
    target.mkdir()
    with _started() as proc:
        assert proc.submit(target, draws, LABELS)
        assert proc.result() is None
        assert proc.submit(tmp_path / "corner.png", draws, LABELS)  # still serving
        assert proc.result() == tmp_path / "corner.png"


def test_the_process_does_not_rerun_the_callers_script(tmp_path, draws):
    # common practice, no published source: a script without a __main__ guard that calls
    # the command must run once (a spawned multiprocessing child would re-run it)
    script = tmp_path / "unguarded.py"
    script.write_text(
        "import pathlib, sys\n"
        "import numpy as np\n"
        "from polkit.plotting.corner_process import CornerProcess\n"
        "runs = pathlib.Path(sys.argv[1])\n"
        "runs.write_text(runs.read_text() + 'x' if runs.exists() else 'x')\n"
        "proc = CornerProcess()\n"
        "assert proc.submit(runs.with_name('c.png'), np.random.default_rng(1)"
        ".standard_normal((500, 2)), ['a', 'b'])\n"
        "assert proc.result() is not None\n"
        "proc.close()\n")
    import subprocess
    import sys

    runs = tmp_path / "runs.txt"
    subprocess.run([sys.executable, str(script), str(runs)], check=True, timeout=600)
    assert runs.read_text() == "x"
    assert (tmp_path / "c.png").exists()


def test_an_unused_process_ends_at_once():
    # common practice, no published source: a fit that fails early must not wait for the
    # helper process's imports
    proc = _started()
    proc.close()
    assert not proc.alive()
    assert proc._proc.returncode == -signal.SIGTERM  # stopped, not awaited
