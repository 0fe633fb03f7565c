"""One check battery over every baseline and detector (scikit-learn's habit): fit returns self,
refit is idempotent, results are deterministic, input is not mutated, masked days are ignored,
shapes are right, and the fitted object pickles (Dask ships it to workers)."""

import pickle

import numpy as np
import pytest

from ebbwatch.baseline import WeekdayProfile
from ebbwatch.detect.changepoint import ChangepointSearch
from ebbwatch.detect.contrasts import WindowTests

RNG = np.random.default_rng(11)
DAILY = RNG.poisson(30, size=(6, 140)).astype(float)


def _fit_window_tests(model, x):
    return model.fit(x, np.ones_like(x), np.zeros(len(x), int), np.full(len(x), 0.5))

CASES = [
    (WeekdayProfile(), lambda m, x: m.fit(x, 0), DAILY, ["factors_", "weeks_"]),
    (WindowTests(reference_days=56), _fit_window_tests, DAILY, ["p_low_", "p_high_", "z_", "change_pct_", "growth_"]),
    (ChangepointSearch(), lambda m, x: m.fit(x), np.log(DAILY + 1), ["sigma_"]),
]
IDS = [type(c[0]).__name__ for c in CASES]


@pytest.mark.parametrize("model, fit, data, fitted", CASES, ids=IDS)
def test_fit_returns_self_and_shapes_are_per_account(model, fit, data, fitted):
    assert fit(model, data.copy()) is model
    for name in fitted:
        assert np.asarray(getattr(model, name)).shape[0] == data.shape[0], name


@pytest.mark.parametrize("model, fit, data, fitted", CASES, ids=IDS)
def test_deterministic_idempotent_and_input_untouched(model, fit, data, fitted):
    original = data.copy()
    first = {n: np.array(getattr(fit(model, data), n)) for n in fitted}
    assert np.array_equal(data, original)
    again = {n: np.array(getattr(fit(type(model)(**model.get_params()), data), n)) for n in fitted}
    refit = {n: np.array(getattr(fit(model, data), n)) for n in fitted}
    for n in fitted:
        assert np.array_equal(first[n], again[n]) and np.array_equal(first[n], refit[n]), n


@pytest.mark.parametrize("model, fit, data, fitted", CASES, ids=IDS)
def test_masked_days_are_ignored(model, fit, data, fitted):
    """A masked (NaN) day with a wild value behind it changes nothing; the shapes hold."""
    clean = fit(type(model)(**model.get_params()), data)
    spiked = data.copy()
    spiked[:, 10] = np.nan
    reference = data.copy()
    reference[:, 10] = np.nan
    masked = fit(type(model)(**model.get_params()), spiked)
    again = fit(type(model)(**model.get_params()), reference)
    for n in fitted:
        assert np.array_equal(np.array(getattr(masked, n)), np.array(getattr(again, n))), n
        assert np.asarray(getattr(masked, n)).shape == np.asarray(getattr(clean, n)).shape


@pytest.mark.parametrize("model, fit, data, fitted", CASES, ids=IDS)
def test_pickles(model, fit, data, fitted):
    fitted_model = fit(model, data)
    clone = pickle.loads(pickle.dumps(fitted_model))
    for n in fitted:
        assert np.array_equal(np.array(getattr(clone, n)), np.array(getattr(fitted_model, n)))


@pytest.mark.parametrize("model, fit, data, fitted", CASES, ids=IDS)
def test_bad_settings_fail_in_fit(model, fit, data, fitted):
    params = model.get_params()
    key = next(iter(params))
    broken = type(model)(**{**params, key: -1 if not isinstance(params[key], str) else "nonsense"})
    with pytest.raises(ValueError):
        fit(broken, data)


def test_weekday_profile_recovers_planted_factors():
    shape = np.array([1.2, 1.2, 1.2, 1.2, 1.0, 0.1, 0.1])
    shape /= shape.mean()
    x = np.tile(shape, 40)[None, :] * 200
    model = WeekdayProfile(shrink_weeks=0).fit(x, first_weekday=0)
    np.testing.assert_allclose(model.factors_[0], shape, rtol=1e-9)
    short = WeekdayProfile(shrink_weeks=4).fit(x[:, -14:], first_weekday=0)
    assert np.all(np.abs(short.factors_[0] - 1) < np.abs(shape - 1))  # two weeks: pulled toward flat
