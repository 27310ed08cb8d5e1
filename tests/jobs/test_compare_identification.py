"""A model whose addition the map does not identify is 'not needed', not a failed comparison."""

from __future__ import annotations

import numpy as np
import pytest

from polkit.errors import ConfigError
from polkit.jobs.dispersion.compare import _mark_unidentified, compare_models
from polkit.jobs.dispersion.comparison import ModelComparison, ModelScore


class _Draws:
    """Stands in for a fit: named posterior draws."""

    model = "three_oscillator"

    def __init__(self, **draws):
        self._d = {k: np.asarray(v, dtype=float) for k, v in draws.items()}

    def draws(self, name):
        return self._d[name]


def _score(model, elpd_i, converged):
    n = elpd_i.size
    return ModelScore(model=model, elpd_loo=float(elpd_i.sum()), elpd_loo_se=1.0, p_loo=3.0,
                      elpd_waic=float(elpd_i.sum()), elpd_waic_se=1.0, p_waic=3.0,
                      linear_per_spectrum=3.0, n_parameters=7, max_pareto_k=0.3, n_high_k=0,
                      converged=converged, elpd_i=elpd_i, pareto_k=np.zeros(n))


def _comparison(r2, elpd_three_shift, three_converged=False):
    rng = np.random.default_rng(1)
    base = rng.normal(-100.0, 1.0, 40)
    scores = {"two": _score("two", base, True),
              "three": _score("three", base + elpd_three_shift / 40 + rng.normal(0, 0.01, 40),
                              three_converged)}
    n = r2.size
    fits = {"three": _Draws(rabi_splitting2=r2, cavity_linewidth=np.full(n, 0.3),
                            exciton2_linewidth=np.full(n, 0.2))}
    _mark_unidentified(scores, fits)
    return ModelComparison(scores, fits, "two", "note", "angle", np.arange(40.0))


def test_an_unidentified_second_exciton_is_not_needed_and_does_not_fail_the_comparison():
    # Source: visibility of a splitting, 2g > (gamma_C + gamma_X)/2 (Savona et al., Solid
    # State Commun. 93, 733 (1995)); a coupling spread from 0 to 2.4 meV with 0.25 meV the
    # visibility limit is not identified (about 10 % of the draws below it)
    r2 = np.random.default_rng(2).uniform(0.0, 2.4, 4000)
    cmp = _comparison(r2, elpd_three_shift=-5.0)
    assert cmp.scores["three"].identified is False
    assert cmp.converged is True and cmp.preferred() == "two"
    assert "not needed" in cmp.verdict() and "not every fit converged" not in cmp.verdict()
    assert "no (not needed)" in cmp.table()
    assert cmp.summary()["models"]["three"]["identified"] is False


def test_a_clearly_coupled_second_exciton_that_did_not_converge_still_fails():
    # common practice, no published source: an identified model must converge
    r2 = np.random.default_rng(3).normal(4.0, 0.2, 4000)  # far above 0.25 meV
    cmp = _comparison(r2, elpd_three_shift=-5.0)
    assert cmp.scores["three"].identified is True and cmp.converged is False
    assert "not every fit converged" in cmp.verdict()


def test_a_clearly_better_three_oscillator_fit_is_never_called_not_needed():
    # common practice, no published source
    r2 = np.random.default_rng(4).uniform(0.0, 2.4, 4000)
    cmp = _comparison(r2, elpd_three_shift=+50.0)
    assert cmp.scores["three"].identified is True and cmp.converged is False


def test_resuming_a_comparison_needs_the_seed():
    # common practice, no published source
    with pytest.raises(ConfigError, match="pass --seed N with --resume"):
        compare_models("unused.nc", resume=True, out="x")
