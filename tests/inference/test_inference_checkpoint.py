"""HDF5 checkpoints: an interrupted or killed run resumes to the same chain as an unbroken one."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import textwrap
from pathlib import Path

import h5py
import numpy as np
import pytest

from polkit.errors import ConfigError, ConvergenceWarning
from polkit.inference import Parameter, ParameterSpace, Prior, run_ensemble

# a tiny invented model: a correlated 2-D Gaussian posterior
SPACE = ParameterSpace([Parameter("a", "meV", Prior.uniform(-10, 10)),
                        Parameter("b", "eV", Prior.uniform(-10, 10))])
START = np.array([0.1, -0.1])
SETTINGS = dict(n_walkers=8, max_steps=120, min_steps=120, check_every=40, progress=False)


def loglike(theta):
    a, b = theta[:, 0], theta[:, 1]
    return -0.5 * (a**2 + b**2 - 1.2 * a * b) / 0.64


def stored_steps(path: Path, group: str = "ensemble0") -> np.ndarray:
    with h5py.File(path, "r") as fh:
        n = int(fh[group].attrs["iteration"])
        return fh[group]["chain"][:n]


@pytest.fixture(scope="module")
def reference():
    with pytest.warns(ConvergenceWarning):
        return run_ensemble(loglike, SPACE, START, seed=31, settings=SETTINGS)


def test_checkpointed_run_equals_in_memory_run(tmp_path, reference):
    # common practice, no published source: the storage backend does not change the chain
    with pytest.warns(ConvergenceWarning):
        out = run_ensemble(loglike, SPACE, START, seed=31, checkpoint=tmp_path / "c.h5",
                           settings=SETTINGS)
    np.testing.assert_array_equal(out.chains, reference.chains)
    np.testing.assert_array_equal(stored_steps(tmp_path / "c.h5"), reference.chains[0])


def test_checkpoint_reads_back_through_emcees_own_backend(tmp_path, reference):
    # Source: emcee's HDFBackend (emcee 3, Foreman-Mackey et al., PASP 125, 306 (2013)) is
    # the reader of the layout polkit writes step by step through HDF5's low-level calls:
    # chain, log-probability, acceptance counts, iteration and generator state must read
    # back as an emcee-written file's would
    import emcee

    path = tmp_path / "c.h5"
    with pytest.warns(ConvergenceWarning):
        run_ensemble(loglike, SPACE, START, seed=31, checkpoint=path, settings=SETTINGS)
    backend = emcee.backends.HDFBackend(os.fspath(path), name="ensemble0", read_only=True)
    chain = backend.get_chain()
    assert backend.iteration == SETTINGS["max_steps"]
    np.testing.assert_array_equal(chain, reference.chains[0])
    np.testing.assert_array_equal(backend.get_log_prob(), reference.log_prob[0])
    moved = np.any(chain[1:] != chain[:-1], axis=-1).sum(axis=0)
    # the first step's move away from the starting ball is counted but not in the chain
    assert set(np.unique(backend.accepted - moved)) <= {0.0, 1.0}
    # the stored generator state is the one after the last step: continuing it by hand
    # from the last sample with emcee's sampler reproduces a longer polkit run's next step
    state = backend.get_last_sample()
    assert state.random_state[0] == "MT19937" and len(state.random_state[1]) == 624
    with pytest.warns(ConvergenceWarning):
        longer = run_ensemble(loglike, SPACE, START, seed=31,
                              settings={**SETTINGS, "max_steps": SETTINGS["max_steps"] + 1})
    from polkit.inference.posterior import LogPosterior
    from polkit.inference.sampler import default_moves

    sampler = emcee.EnsembleSampler(SETTINGS["n_walkers"], 2, LogPosterior(loglike, SPACE),
                                    moves=default_moves(), vectorize=True)
    nxt = sampler.run_mcmc(state, 1, progress=False, skip_initial_state_check=True)
    np.testing.assert_array_equal(nxt.coords, longer.chains[0, -1])


def test_keyboard_interrupt_then_resume_gives_the_unbroken_chain(tmp_path, reference):
    # common practice, no published source: resume loses no finished step and continues the
    # same random stream (the generator state is stored with every step)
    path = tmp_path / "c.h5"
    calls = {"n": 0}

    def interrupted(theta):
        calls["n"] += 1
        if calls["n"] == 150:
            raise KeyboardInterrupt
        return loglike(theta)

    with pytest.raises(KeyboardInterrupt):
        run_ensemble(interrupted, SPACE, START, seed=31, checkpoint=path, settings=SETTINGS)
    before = stored_steps(path)
    assert 0 < len(before) < SETTINGS["max_steps"]
    with pytest.warns(ConvergenceWarning):
        out = run_ensemble(loglike, SPACE, START, SETTINGS, checkpoint=path, resume=True)
    np.testing.assert_array_equal(out.chains[0, : len(before)], before)
    np.testing.assert_array_equal(out.chains, reference.chains)
    np.testing.assert_array_equal(out.log_prob, reference.log_prob)
    assert out.seed_entropy == 31


CHILD = textwrap.dedent(
    """
    import os, signal, sys
    import numpy as np
    sys.path.insert(0, {tests!r})
    from test_inference_checkpoint import SETTINGS, SPACE, START, loglike
    from polkit.inference import run_ensemble

    calls = 0
    def killed(theta):
        global calls
        calls += 1
        if calls == int(sys.argv[2]):
            os.kill(os.getpid(), signal.SIGKILL)
        return loglike(theta)

    run_ensemble(killed, SPACE, START, seed=31, checkpoint=sys.argv[1], resume=True,
                 settings=SETTINGS)
    """
)


@pytest.mark.skipif(not hasattr(signal, "SIGKILL"), reason="needs POSIX signals")
def test_sigkill_then_resume_gives_the_unbroken_chain(tmp_path, reference):
    # common practice, no published source: a process killed without warning (SIGKILL)
    # leaves a checkpoint that resumes to the same chain
    path = tmp_path / "killed.h5"
    script = tmp_path / "child.py"
    script.write_text(CHILD.format(tests=str(Path(__file__).resolve().parent)))
    env = {**os.environ, "PYTHONHASHSEED": "0"}
    proc = subprocess.run([sys.executable, str(script), str(path), "170"], env=env,
                          capture_output=True, timeout=300)
    assert proc.returncode == -signal.SIGKILL, proc.stderr.decode()[-2000:]
    before = stored_steps(path)
    assert 0 < len(before) < SETTINGS["max_steps"]
    np.testing.assert_array_equal(before, reference.chains[0, : len(before)])
    with pytest.warns(ConvergenceWarning):
        out = run_ensemble(loglike, SPACE, START, SETTINGS, checkpoint=path, resume=True)
    np.testing.assert_array_equal(out.chains, reference.chains)


def test_resume_of_a_strict_run_interrupted_in_a_later_ensemble(tmp_path):
    # common practice, no published source: finished ensembles are kept, the interrupted one
    # continues, later ones start from their own seeds
    kw = {**SETTINGS, "strict": True, "max_steps": 80, "min_steps": 80}
    with pytest.warns(ConvergenceWarning):
        ref = run_ensemble(loglike, SPACE, START, seed=5, settings=kw)
    calls = {"n": 0}

    def interrupted(theta):
        calls["n"] += 1
        if calls["n"] == 420:  # in the second or third ensemble
            raise KeyboardInterrupt
        return loglike(theta)

    path = tmp_path / "strict.h5"
    with pytest.raises(KeyboardInterrupt):
        run_ensemble(interrupted, SPACE, START, seed=5, checkpoint=path, settings=kw)
    assert len(stored_steps(path, "ensemble0")) == 80
    assert 0 < len(stored_steps(path, "ensemble1")) + len(stored_steps(path, "ensemble2")) < 160
    assert len(stored_steps(path, "ensemble3")) == 0
    with pytest.warns(ConvergenceWarning):
        out = run_ensemble(loglike, SPACE, START, checkpoint=path, resume=True, settings=kw)
    np.testing.assert_array_equal(out.chains, ref.chains)


def test_checkpoint_of_another_run_is_refused(tmp_path):
    # common practice, no published source
    path = tmp_path / "c.h5"
    with pytest.warns(ConvergenceWarning):
        run_ensemble(loglike, SPACE, START, seed=1, checkpoint=path, settings={**SETTINGS,
                     "max_steps": 10})
    with pytest.raises(ConfigError, match="checkpoint of an earlier run is here") as info:
        run_ensemble(loglike, SPACE, START, seed=1, checkpoint=path, settings=SETTINGS)
    assert str(path) in str(info.value)
    other = ParameterSpace([Parameter("a", "meV", Prior.uniform(-10, 10)),
                            Parameter("c", "eV", Prior.uniform(-10, 10))])
    with pytest.raises(ConfigError, match=r"belongs to parameters \['a', 'b'\]") as info:
        run_ensemble(loglike, other, START, checkpoint=path, resume=True, settings=SETTINGS)
    assert str(path) in str(info.value)
    with pytest.raises(ConfigError, match="holds 8 walkers"):
        run_ensemble(loglike, SPACE, START, checkpoint=path, resume=True,
                     settings={**SETTINGS, "n_walkers": 10})
    with pytest.raises(ConfigError, match="different seed"):
        run_ensemble(loglike, SPACE, START, SETTINGS, seed=2, checkpoint=path, resume=True)
    stranger = tmp_path / "stranger.h5"
    with h5py.File(stranger, "w") as fh:
        fh["x"] = 1
    with pytest.raises(ConfigError, match="not a polkit checkpoint"):
        run_ensemble(loglike, SPACE, START, SETTINGS, checkpoint=stranger, resume=True)


def test_resume_with_a_larger_step_limit_extends_an_unconverged_run(tmp_path):
    # common practice, no published source: "run longer" on a run that stopped at its step
    # limit must give the chain an uninterrupted run with the larger limit would have given.
    import warnings as _w

    import numpy as _np

    from polkit.errors import ConvergenceWarning as _CW
    from polkit.inference import Parameter as _P
    from polkit.inference import ParameterSpace as _S
    from polkit.inference import Prior as _Pr
    from polkit.inference import run_ensemble as _run

    space = _S([_P("a", "1", _Pr.uniform(-10, 10)), _P("b", "1", _Pr.uniform(-10, 10))])

    def like(t):
        return -0.5 * _np.sum((t - 1.0) ** 2 / 0.3**2, axis=1)

    kw = dict(n_walkers=8, min_steps=100, check_every=100, progress=False)
    with _w.catch_warnings():
        _w.simplefilter("ignore", _CW)
        _run(like, space, _np.array([1.0, 1.0]), {**kw, "max_steps": 200}, seed=3,
             checkpoint=tmp_path / "a.h5")
        ext = _run(like, space, _np.array([1.0, 1.0]), {**kw, "max_steps": 400}, seed=3,
                   checkpoint=tmp_path / "a.h5", resume=True)
        straight = _run(like, space, _np.array([1.0, 1.0]), {**kw, "max_steps": 400}, seed=3,
                        checkpoint=tmp_path / "b.h5")
    assert ext.chains.shape == straight.chains.shape
    assert ext.chains.shape[1] > 200
    _np.testing.assert_array_equal(ext.chains, straight.chains)
