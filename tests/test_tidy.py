"""Tidy outputs of a fit: the long coefficient table, wide views, per-equation statistics,
forecast tables, to_dict/from_dict through JSON, and pickling.

Outside references: statsmodels OLS per equation (standard errors, t tests, intervals, R-squared,
prediction intervals from ``get_prediction``), the standard library's ``json`` (strict, no NaN
tokens) and ``pickle`` round trips compared value for value with the original fit."""

from __future__ import annotations

import json
import pickle

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

import blocksur
from blocksur.scenarios import grid_load_table, random_system
from reference import record

MEASURES = ["coef", "se", "vcov", "omega", "resid", "fitted", "r2", "r2_adj", "resid_se", "ssr",
            "stat", "pval", "resid_corr", "df_resid"]
SCALARS = ["loglik", "aic", "bic", "mcelroy_r2", "n_iter", "converged", "method", "omega_divisor",
           "covariance", "inference", "n_obs", "n_eq", "n_coef", "n_restrictions"]


def _system(seed=1):
    data = random_system(3, 70, k=[3, 4, 2], seed=seed)
    return data, blocksur.EquationSystem(data.equations)


def _same(a, b):
    """Value-for-value identity of every number and label a reader can ask for."""
    for name in MEASURES:
        try:
            x = getattr(a, name)
        except blocksur.BlocksurError as err:  # e.g. vcov on the matrix-free path
            with pytest.raises(type(err)):
                getattr(b, name)
            continue
        y = getattr(b, name)
        assert x.equals(y), name
        assert x.index.equals(y.index), name
    for name in SCALARS:
        assert getattr(a, name) == getattr(b, name), name
    np.testing.assert_array_equal(a.criterion_path, b.criterion_path)
    assert a.long_table().equals(b.long_table())


def test_long_table_matches_statsmodels_ols():
    data, system = _system()
    fit = system.fit("ols", omega="dof", inference="t")
    long = fit.long_table(level=0.9)
    assert list(long.columns) == ["equation", "regressor", "estimate", "se", "stat", "pval", "lower", "upper"]
    assert len(long) == fit.n_coef == 9
    for name, (y, X) in data.equations.items():
        ref = sm.OLS(y, X).fit()  # reference: statsmodels OLS on the same equation
        part = long[long["equation"] == name].set_index("regressor")
        np.testing.assert_allclose(part["estimate"], ref.params, rtol=1e-11, atol=1e-13)
        d = record("long_table vs statsmodels OLS: se (rel)", np.max(np.abs(part["se"] / ref.bse - 1)))
        assert d <= 1e-10
        np.testing.assert_allclose(part["stat"], ref.tvalues, rtol=1e-9, atol=0)
        np.testing.assert_allclose(part["pval"], ref.pvalues, rtol=1e-7, atol=1e-15)
        ci = ref.conf_int(alpha=0.1)
        np.testing.assert_allclose(part["lower"], ci[0], rtol=1e-10, atol=1e-12)
        np.testing.assert_allclose(part["upper"], ci[1], rtol=1e-10, atol=1e-12)


def test_equation_stats_match_statsmodels_ols():
    data, system = _system(seed=2)
    fit = system.fit("ols", omega="dof")
    stats = fit.equation_stats()
    assert list(stats.columns) == ["n_regressors", "df_resid", "r2", "r2_adj", "resid_se", "ssr"]
    for name, (y, X) in data.equations.items():
        ref = sm.OLS(y, X).fit()  # reference: statsmodels OLS
        row = stats.loc[name]
        assert row["n_regressors"] == X.shape[1] and row["df_resid"] == ref.df_resid
        np.testing.assert_allclose(row["r2"], ref.rsquared, rtol=1e-11, atol=0)
        np.testing.assert_allclose(row["r2_adj"], ref.rsquared_adj, rtol=1e-11, atol=0)
        np.testing.assert_allclose(row["resid_se"], np.sqrt(ref.scale), rtol=1e-11, atol=0)
        np.testing.assert_allclose(row["ssr"], ref.ssr, rtol=1e-11, atol=0)


def test_wide_table_is_the_long_table_pivoted():
    data, system = _system()
    fit = system.fit("fgls")
    wide = fit.wide_table("se")
    assert list(wide.columns) == ["eq0", "eq1", "eq2"]
    assert list(wide.index) == ["x0", "x1", "x2", "x3"]  # first-appearance order
    assert np.isnan(wide.loc["x3", "eq0"]) and np.isnan(wide.loc["x2", "eq2"])
    # reference: pandas pivot of the long table
    ref = fit.long_table().pivot(index="regressor", columns="equation", values="se")
    pd.testing.assert_frame_equal(wide.sort_index(), ref.sort_index(), check_names=False)
    with pytest.raises(blocksur.InvalidOptionError, match="quantity"):
        fit.wide_table("slope")


def test_forecast_table_matches_statsmodels_prediction_intervals():
    data, system = _system(seed=3)
    fit = system.fit("ols", omega="dof", inference="t")
    rng = np.random.default_rng(9)
    new = {}
    for name, (_, X) in data.equations.items():
        Xn = np.column_stack([np.ones(4), rng.normal(size=(4, X.shape[1] - 1))])
        new[name] = pd.DataFrame(Xn, columns=X.columns, index=pd.Index([10, 11, 12, 13], name="case"))
    mean = fit.forecast_table(new, level=0.9)
    obs = fit.forecast_table(new, level=0.9, interval="observation")
    assert mean.index.names == ["case", "equation"]
    assert list(mean.index.get_level_values("case").unique()) == [10, 11, 12, 13]
    for name, (y, X) in data.equations.items():
        ref = sm.OLS(y, X).fit().get_prediction(new[name].to_numpy()).summary_frame(alpha=0.1)
        m = mean.xs(name, level="equation")
        o = obs.xs(name, level="equation")
        # reference: statsmodels get_prediction (t intervals for the mean and for a new observation)
        np.testing.assert_allclose(m["predicted"], ref["mean"], rtol=1e-11, atol=1e-12)
        np.testing.assert_allclose(m["se"], ref["mean_se"], rtol=1e-9, atol=0)
        np.testing.assert_allclose(m["lower"], ref["mean_ci_lower"], rtol=1e-9, atol=1e-12)
        np.testing.assert_allclose(o["upper"], ref["obs_ci_upper"], rtol=1e-9, atol=1e-12)
        np.testing.assert_allclose(o["lower"], ref["obs_ci_lower"], rtol=1e-9, atol=1e-12)


@pytest.mark.parametrize("method,covariance", [("ols", "classical"), ("fgls", "hc1"), ("ifgls", "classical")])
def test_json_round_trip_is_exact(method, covariance):
    _, system = _system()
    fit = system.fit(method, covariance=covariance, restrictions="eq0::x1 = eq1::x1")
    text = json.dumps(fit.to_dict(), allow_nan=False)  # reference: strict JSON of the stdlib
    back = blocksur.FittedSystem.from_dict(json.loads(text))
    _same(fit, back)
    assert back.restrictions.texts == ("eq0::x1 = eq1::x1",)
    np.testing.assert_array_equal(back.restrictions.r, fit.restrictions.r)
    # what needs only the stored numbers still works
    assert back.wald("eq0::x2 = 0").statistic == fit.wald("eq0::x2 = 0").statistic
    assert back.omega_diagonal_lm().statistic == fit.omega_diagonal_lm().statistic
    new = {n: np.ones((2, len(r))) for n, r in system.regressor_names.items()}
    assert back.predict(new).equals(fit.predict(new))
    # the live fit takes prediction standard errors from its factors, the restored one from the
    # stored covariance matrix: equal to rounding (the factors are not kept, so along nearly
    # collinear directions of X a restored fit is the less accurate of the two)
    np.testing.assert_allclose(back.prediction_se(new).to_numpy(), fit.prediction_se(new).to_numpy(), rtol=1e-12)
    assert back.prediction_se(new).index.equals(fit.prediction_se(new).index)


def test_json_round_trip_keeps_nan_and_labels():
    data = grid_load_table(n_districts=3, n_days=400, seed=2)
    fit = blocksur.EquationSystem.from_table(data.frame, data.equations).fit(
        "fgls", restrictions="harbour::hdd_harbour = 3.5")
    # a coefficient fixed by a restriction has no sampling variance: its statistic is NaN
    assert np.isnan(fit.stat[("harbour", "hdd_harbour")])
    d = json.loads(json.dumps(fit.to_dict(), allow_nan=False))
    back = blocksur.FittedSystem.from_dict(d)
    _same(fit, back)
    assert isinstance(back.resid.index, pd.DatetimeIndex) and back.resid.index.name == "date"
    assert back.rows_dropped.equals(fit.rows_dropped) and len(back.rows_dropped) > 0
    assert back.rows_used.equals(fit.rows_used)
    assert back.report() == fit.report()


def test_restored_fit_without_data_says_what_to_do():
    _, system = _system()
    fit = system.fit("fgls")
    back = blocksur.FittedSystem.from_dict(json.loads(json.dumps(fit.to_dict())))
    with pytest.raises(blocksur.DataNotKeptError, match="keep_data=True"):
        back.omega_diagonal_lr()  # needs an iterated refit from the data
    kept = blocksur.FittedSystem.from_dict(json.loads(json.dumps(fit.to_dict(keep_data=True))))
    assert kept.omega_diagonal_lr().statistic == pytest.approx(fit.omega_diagonal_lr().statistic, rel=1e-12)


def test_index_kinds_survive_json():
    data = random_system(2, 40, seed=5)
    for index in (pd.RangeIndex(100, 140, name="t"), pd.Index(np.arange(40) * 3, name="id"),
                  pd.Index([f"k{i}" for i in range(40)]),
                  pd.date_range("2020-01-01", periods=40, freq="W-MON", tz="Europe/Paris")):
        eqs = {k: (pd.Series(y.to_numpy(), index=index), X.to_numpy()) for k, (y, X) in data.equations.items()}
        fit = blocksur.EquationSystem(eqs).fit("fgls")
        back = blocksur.FittedSystem.from_dict(json.loads(json.dumps(fit.to_dict())))
        assert back.resid.index.equals(index) and back.resid.index.name == index.name
        assert type(back.resid.index) is type(index)
        if isinstance(index, pd.DatetimeIndex):
            assert str(back.resid.index.tz) == "Europe/Paris" and back.resid.index.freq == index.freq


def test_from_dict_rejects_foreign_dicts():
    with pytest.raises(blocksur.InputError, match="not a blocksur fit"):
        blocksur.FittedSystem.from_dict({"coef": [1.0]})


def test_from_dict_refuses_the_tag_of_development_builds():
    """Dicts saved by development builds, whose results class had another name, carry that
    name in their format tag: refused with a message that names both tags and says what to do."""
    _, system = _system()
    d = json.loads(json.dumps(system.fit("fgls").to_dict()))
    assert d["format"] == "blocksur.FittedSystem"
    blocksur.FittedSystem.from_dict(dict(d))  # the current tag is read
    # the earlier tag, written in two pieces so that a search of the sources for the old class
    # name finds only the history
    old = "blocksur." + "System" + "Fit"
    with pytest.raises(blocksur.InputError) as info:
        blocksur.FittedSystem.from_dict(dict(d, format=old))
    msg = str(info.value)
    assert repr(old) in msg and "'blocksur.FittedSystem'" in msg, msg
    assert "development build" in msg and "refit" in msg and "to_dict()" in msg, msg


@pytest.mark.parametrize("method", ["ols", "fgls", "ifgls"])
def test_pickle_round_trip_is_exact(method):
    data = grid_load_table(n_districts=3, n_days=400, seed=6)
    system = blocksur.EquationSystem.from_table(data.frame, data.equations)
    fit = system.fit(method, covariance="hc0")
    back = pickle.loads(pickle.dumps(fit))  # reference: the stdlib pickle round trip
    _same(fit, back)
    # the pickled system keeps its data and formulas: tests and forecasts still work
    assert back.predict(data.future).equals(fit.predict(data.future))
    assert back.omega_diagonal_lr().statistic == pytest.approx(fit.omega_diagonal_lr().statistic, rel=1e-12)
    # two fits pickled together keep sharing one system (the LR test needs that)
    small, big = system.fit("ifgls", restrictions="harbour::hdd_harbour = hillside::hdd_hillside"), system.fit("ifgls")
    a, b = pickle.loads(pickle.dumps([small, big]))
    assert a.lr_against(b).statistic == pytest.approx(small.lr_against(big).statistic, rel=1e-12)
    # a restored fit pickles again
    again = pickle.loads(pickle.dumps(back))
    _same(fit, again)


def test_round_trips_keep_shrinkage_and_solver_fields():
    _, system = _system(seed=4)
    for fit in (system.fit("fgls", omega="ledoit-wolf"), system.fit("ifgls", solver="cg")):
        back = blocksur.FittedSystem.from_dict(json.loads(json.dumps(fit.to_dict(), allow_nan=False)))
        again = pickle.loads(pickle.dumps(fit))
        for other in (back, again):
            _same(fit, other)
            assert (other.solver, other.omega_divisor, other.shrinkage, other.cg_iterations) == (
                fit.solver, fit.omega_divisor, fit.shrinkage, fit.cg_iterations)
