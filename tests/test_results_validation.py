"""Checks on the results side of the API: the LR test refuses fits that are not nested (and a
restricted fit with the higher likelihood), Wald refuses non-finite or empty restrictions,
prediction from a table refuses categories the fit has no coefficient for, and the report
options are validated.

References: the Gaussian log-likelihood written out from each fit's residuals,
-(NT/2)(1 + ln 2 pi) - (T/2) ln det(S/T), and the standard LR definition
2 (ll_unrestricted - ll_restricted); scipy.stats for p-values; predictions written out by hand
as the treatment-coded design row times the coefficients.
"""

import pickle
import warnings

import numpy as np
import pandas as pd
import pytest
from scipy import stats

import blocksur
from blocksur.errors import (
    InputError,
    InvalidOptionError,
    NotConvergedWarning,
    NumericalError,
    RestrictionError,
)


# -- data ----------------------------------------------------------------------------------------
def _system(seed=0, T=120):
    rng = np.random.default_rng(seed)
    X1 = np.column_stack([np.ones(T), rng.normal(size=(T, 2))])
    X2 = np.column_stack([np.ones(T), rng.normal(size=(T, 2))])
    e = rng.multivariate_normal([0, 0], [[1.0, 0.8], [0.8, 1.0]], size=T)
    return blocksur.EquationSystem(
        {"a": (X1 @ [1.0, 0.5, 0.3] + e[:, 0], X1), "b": (X2 @ [1.0, 0.4, -0.3] + e[:, 1], X2)}
    )


def _loglik_by_hand(fit):
    """-(NT/2)(1 + ln 2 pi) - (T/2) ln det(S/T), S the cross-products of the fit's residuals."""
    e = fit.resid.to_numpy()
    t, n = e.shape
    sign, logdet = np.linalg.slogdet(e.T @ e / t)
    assert sign > 0
    return -(n * t / 2) * (1 + np.log(2 * np.pi)) - (t / 2) * logdet


@pytest.fixture(scope="module")
def system():
    return _system()


# -- F5: lr_against --------------------------------------------------------------------------------
def test_lr_refuses_fits_that_are_not_nested(system):
    # the QA example: neither restriction set implies the other
    a = system.fit("ifgls", restrictions="a::x1 = 0")
    b = system.fit("ifgls", restrictions="b::x1 = 0; b::x2 = 0")
    for first, second in ((a, b), (b, a)):
        with pytest.raises(InvalidOptionError, match="not nested") as info:
            first.lr_against(second)
        assert "a::x1 = 0" in str(info.value) and "follow from" in str(info.value)


def test_lr_refuses_a_restriction_with_another_right_hand_side(system):
    # a::x1 + b::x1 = 1 and a::x1 - b::x1 = 1 imply a::x1 = 1 exactly, not a::x1 = 1.0000001
    tight = system.fit("ifgls", restrictions="a::x1 + b::x1 = 1; a::x1 - b::x1 = 1")
    near = system.fit("ifgls", restrictions="a::x1 = 1.0000001")
    with pytest.raises(InvalidOptionError, match="not nested"):
        tight.lr_against(near)
    same = system.fit("ifgls", restrictions="a::x1 = 1")
    assert tight.lr_against(same).df == 1


def test_lr_of_nested_fits_is_twice_the_loglik_gap(system):
    unrestricted = system.fit("ifgls", tol=1e-12)
    restricted = system.fit("ifgls", restrictions="a::x1 = 0", tol=1e-12)
    # expected: the standard LR definition from log-likelihoods written out from the residuals
    expected = 2 * (_loglik_by_hand(unrestricted) - _loglik_by_hand(restricted))
    for res in (unrestricted.lr_against(restricted), restricted.lr_against(unrestricted)):
        assert res.df == 1 and res.dist == "chi2"
        assert res.statistic == pytest.approx(expected, rel=1e-9)
        assert res.pvalue == pytest.approx(stats.chi2.sf(expected, 1), rel=1e-7)
        assert res.h0 == "a::x1 = 0"
    # a restriction set that implies a::x1 = 0 in another form is nested too:
    # 2 a::x1 = b::x1 and b::x1 = 0 give a::x1 = 0
    both = system.fit("ifgls", restrictions="2*a::x1 = b::x1; b::x1 = 0", tol=1e-12)
    res = both.lr_against(restricted)
    assert res.df == 1
    assert res.statistic == pytest.approx(2 * (_loglik_by_hand(restricted) - _loglik_by_hand(both)), rel=1e-9)


def test_lr_refuses_a_restricted_fit_with_the_higher_likelihood(system):
    unrestricted = system.fit("ifgls", tol=1e-13)
    # a restriction at the ML estimate itself costs nothing: its fit reaches the maximum
    value = float(unrestricted.coef[("a", "x1")])
    at_max = system.fit("ifgls", restrictions=f"a::x1 = {value!r}", tol=1e-13)
    res = unrestricted.lr_against(at_max)
    assert 0.0 <= res.statistic < 1e-6  # rounding of two equal maxima, clipped at 0
    with pytest.warns(NotConvergedWarning):
        stopped = system.fit("ifgls", max_iter=1)  # one GLS step: below the maximum
    assert stopped.loglik < at_max.loglik - 1e-3
    with pytest.warns(NotConvergedWarning, match="did not converge"):
        with pytest.raises(NumericalError, match="higher log-likelihood"):
            stopped.lr_against(at_max)


def test_lr_against_a_non_fit_is_a_type_error(system):
    fit = system.fit("ifgls")
    for other in (3, None, "fit"):
        with pytest.raises(TypeError, match="FittedSystem of the same EquationSystem"):
            fit.lr_against(other)


# -- F10: wald with bad (R, q) -------------------------------------------------------------------------
def test_wald_refuses_non_finite_restrictions_like_fit(system):
    fit = system.fit("fgls")
    k = fit.n_coef
    r = np.zeros((1, k))
    r[0, 1] = 1.0
    bad = [
        (np.full((1, k), np.nan), [0.0]),
        (r, [np.inf]),
        (r, [-np.inf]),
        (r, [np.nan]),
        (np.where(r > 0, np.inf, 0.0), [0.0]),
    ]
    for spec in bad:
        with pytest.raises(RestrictionError, match="the restrictions contain NaN or infinite values"):
            fit.wald(spec)
        with pytest.raises(RestrictionError, match="the restrictions contain NaN or infinite values"):
            system.fit("fgls", restrictions=spec)


def test_wald_names_a_zero_row_as_mentioning_no_coefficient(system):
    fit = system.fit("fgls")
    r = np.zeros((2, fit.n_coef))
    r[0, 1] = 1.0  # row 1 stays zero
    with pytest.raises(RestrictionError, match="mentions no coefficient") as info:
        fit.wald((r, [0.0, 0.0]))
    assert info.value.index == 1 and "row 1 of R" in str(info.value)
    with pytest.raises(RestrictionError, match="mentions no coefficient"):
        system.fit("fgls", restrictions=(r, [0.0, 0.0]))
    # a finite, non-zero pair still works, as does the same test written as text
    assert fit.wald((r[:1], [0.0])).statistic == pytest.approx(fit.wald("a::x1 = 0").statistic, rel=1e-12)


@pytest.mark.parametrize("spec", [None, 5, 2.5, b"a::x1 = 0"])
def test_wald_without_restrictions_says_what_to_pass(system, spec):
    fit = system.fit("fgls")
    with pytest.raises(TypeError, match=r"restriction string .* \(R, q\) pair"):
        fit.wald(spec)


# -- F7: predict from a table with unknown or missing categories -----------------------------------------
@pytest.fixture(scope="module")
def table_fit():
    rng = np.random.default_rng(5)
    n = 90
    df = pd.DataFrame({
        "x": rng.normal(size=n),
        "s": rng.choice(["a", "b", "c"], n),
        "y2": rng.normal(size=n),
    })
    df["y1"] = 1.0 + df["x"] + 2.0 * (df["s"] == "b") - 1.0 * (df["s"] == "c") + rng.normal(size=n)
    fit = blocksur.EquationSystem.from_table(df, {"a": "y1 ~ x + C(s)", "b": "y2 ~ x"}).fit("fgls")
    new = pd.DataFrame({"x": [0.5, -1.0, 2.0, 0.0], "s": ["a", "b", "c", "b"]}, index=[10, 11, 12, 13])
    return fit, new


def test_predict_with_seen_levels_matches_the_coefficients(table_fit):
    fit, new = table_fit
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # no DataMismatchWarning or other noise on good data
        pred = fit.predict(new)
        se = fit.prediction_se(new)
    b = fit.coef
    # expected: treatment coding written out by hand (level 'a' is the reference)
    dummies = {"a": (0, 0), "b": (1, 0), "c": (0, 1)}
    for label, row in new.iterrows():
        db, dc = dummies[row["s"]]
        want = (b[("a", "Intercept")] + b[("a", "x")] * row["x"]
                + b[("a", "C(s)[T.b]")] * db + b[("a", "C(s)[T.c]")] * dc)
        assert pred.loc[label, "a"] == pytest.approx(want, rel=1e-13, abs=1e-13)
        assert pred.loc[label, "b"] == pytest.approx(b[("b", "Intercept")] + b[("b", "x")] * row["x"],
                                                     rel=1e-13, abs=1e-13)
    assert np.all(np.isfinite(se.to_numpy())) and np.all(se.to_numpy() > 0)


@pytest.mark.parametrize("method", ["predict", "prediction_se"])
def test_predict_refuses_an_unseen_level(table_fit, method):
    fit, new = table_fit
    bad = new.assign(s=["a", "zz", "c", "zz"])
    with pytest.raises(InputError) as info:
        getattr(fit, method)(bad)
    err = info.value
    assert isinstance(err, ValueError)
    assert (err.equation, err.column, err.values, err.rows) == ("a", "s", ["zz"], [1, 3])
    text = str(err)
    assert "equation 'a'" in text and "column 's'" in text
    assert "'zz' (row 1)" in text and "'zz' (row 3)" in text
    assert "known levels are 'a', 'b', 'c'" in text


@pytest.mark.parametrize("missing", [np.nan, None])
def test_predict_refuses_a_missing_category(table_fit, missing):
    fit, new = table_fit
    bad = new.copy()
    bad["s"] = pd.Series(["a", "b", missing, "c"], index=new.index, dtype=object)
    for method in (fit.predict, fit.prediction_se, fit.forecast_table):
        with pytest.raises(InputError, match=r"a missing value \(row 2\)") as info:
            method(bad)
        assert (info.value.equation, info.value.column, info.value.rows) == ("a", "s", [2])
    # a whole column of NaN (the QA example) too
    with pytest.raises(InputError, match="column 's'"):
        fit.predict(new.assign(s=np.nan))


def test_predict_refuses_unseen_levels_after_pickling(table_fit):
    fit, new = table_fit
    back = pickle.loads(pickle.dumps(fit))
    with pytest.raises(InputError, match="'zz' \\(row 0\\)"):
        back.predict(new.assign(s="zz"))


def test_predict_lists_long_level_sets_truncated():
    rng = np.random.default_rng(2)
    n = 300
    levels = [f"L{i:02d}" for i in range(30)]
    df = pd.DataFrame({"x": rng.normal(size=n), "s": np.repeat(levels, n // 30), "y2": rng.normal(size=n)})
    df["y1"] = df["x"] + rng.normal(size=n)
    fit = blocksur.EquationSystem.from_table(df, {"a": "y1 ~ x + C(s)", "b": "y2 ~ x"}).fit("ols")
    new = pd.DataFrame({"x": np.zeros(8), "s": ["L00"] + [f"new{i}" for i in range(7)]})
    with pytest.raises(InputError) as info:
        fit.predict(new)
    text = str(info.value)
    assert "'L19'" in text and "'L20'" not in text and "10 more, 30 in all" in text
    assert "(7 rows in all)" in text and "'new4' (row 5)" in text and "'new5'" not in text
    assert info.value.rows == list(range(1, 8)) and len(info.value.levels) == 30


def test_predict_refuses_unseen_levels_of_a_computed_category(table_fit):
    fit, new = table_fit
    df_fit = pd.DataFrame({"x": new["x"].tolist() * 10, "s": new["s"].tolist() * 10,
                           "y1": np.arange(40.0) % 7, "y2": np.arange(40.0) % 5})
    computed = blocksur.EquationSystem.from_table(
        df_fit, {"a": "y1 ~ x + C(s.str.upper())", "b": "y2 ~ x"}).fit("ols")
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        computed.predict(new)
    with pytest.raises(InputError, match="equation 'a'.*no coefficient for: \\{'ZZ'\\}"):
        computed.predict(new.assign(s=["a", "zz", "b", "c"]))


# -- F11: report options ------------------------------------------------------------------------------
@pytest.fixture(scope="module")
def fit(system):
    return system.fit("ifgls")


@pytest.mark.parametrize(
    "method, kwargs, allowed",
    [
        ("report", {"max_equations": -1}, "max_equations must be a whole number >= 1, or None"),
        ("report", {"max_equations": 0}, "max_equations"),
        ("report", {"max_equations": 1.5}, "max_equations"),
        ("report", {"max_equations": True}, "max_equations"),
        ("report", {"max_equations": "3"}, "max_equations"),
        ("report", {"width": 5}, "width must be a whole number from 80 to 1000"),
        ("report", {"width": 79}, "width"),
        ("report", {"width": 100.0}, "width"),
        ("report", {"width": 10**6}, "width"),
        ("report", {"level": "a"}, "level must be a number between 0 and 1"),
        ("report", {"level": 1.5}, "level must be a number between 0 and 1"),
        ("report_html", {"max_equations": 0}, "max_equations"),
        ("report_html", {"level": 0.0}, "level"),
        ("to_latex", {"digits": -1}, "digits .* must be a whole number from 1 to 15"),
        ("to_latex", {"digits": 0}, "digits"),
        ("to_latex", {"digits": 16}, "digits"),
        ("to_latex", {"digits": 2.5}, "digits"),
        ("to_latex", {"caption": 3}, "caption must be a string or None"),
        ("to_markdown", {"digits": "a"}, "digits .* must be a whole number from 1 to 15"),
        ("to_markdown", {"digits": None}, "digits"),
        ("to_markdown", {"level": True}, "level"),
        ("to_markdown", {"caption": ["a"]}, "caption must be a string or None"),
        ("to_latex", {"label": 1}, "label must be a string or None"),
    ],
)
def test_report_options_are_validated(fit, method, kwargs, allowed):
    with pytest.raises(InvalidOptionError, match=allowed):
        getattr(fit, method)(**kwargs)


def test_report_options_at_their_limits_work(fit):
    narrow = fit.report(width=80)
    assert max(len(line) for line in narrow.splitlines()) <= 80
    assert "more equations not shown" in fit.report(max_equations=np.int64(1))
    assert "more equations not shown" not in fit.report(max_equations=None)
    assert "more equations not shown" not in fit.report_html(max_equations=None)
    one = fit.to_markdown(digits=1)
    fifteen = fit.to_latex(digits=15)
    # the estimate column shows digits + 1 significant digits, in fixed point at most 9
    # decimals (format_number's rule); a::x1 is about 0.54, so 2 and 9 decimals
    est = float(fit.coef[("a", "x1")])
    assert 0.1 < est < 1
    assert f"| a | x1 | {est:.2f} |" in one
    assert f"& x1 & {est:.9f} &" in fifteen


def test_lr_accepts_a_fit_of_an_unpickled_copy_and_refuses_other_data(system):
    """Fits of an unpickled copy of the system (same equations, names and data) are fits of the
    same model: the LR statistic is the same as between fits of the one object (definition).
    A system with other data is refused; rows given as 1e-200 * (restriction) nest as the plain
    one (rows compared after scaling by their largest entry)."""
    import pickle

    unrestricted = system.fit("ifgls", tol=1e-12)
    restricted = system.fit("ifgls", restrictions="a::x1 = 0", tol=1e-12)
    copy = pickle.loads(pickle.dumps(system))
    restricted_copy = copy.fit("ifgls", restrictions="a::x1 = 0", tol=1e-12)
    want = unrestricted.lr_against(restricted).statistic
    assert unrestricted.lr_against(restricted_copy).statistic == pytest.approx(want, rel=1e-12)
    pos = list(unrestricted.coef.index).index(("a", "x1"))
    r = np.zeros((1, unrestricted.n_coef))
    r[0, pos] = 1e-200  # its square underflows
    scaled = system.fit("ifgls", restrictions=(r, np.zeros(1)), tol=1e-12)
    assert unrestricted.lr_against(scaled).statistic == pytest.approx(want, rel=1e-9)
    both = system.fit("ifgls", restrictions="a::x1 = 0; b::x1 = 0", tol=1e-12)
    plain = both.lr_against(restricted).statistic
    assert both.lr_against(scaled).statistic == pytest.approx(plain, rel=1e-9)
    other = _system(seed=1).fit("ifgls", restrictions="a::x1 = 0", tol=1e-12)
    with pytest.raises(InvalidOptionError, match="same EquationSystem"):
        unrestricted.lr_against(other)


# ---------------------------------------------------------------------------
# variances beyond double precision


@pytest.mark.parametrize("scale, entry", [(1e-170, np.inf), (1e200, 0.0)])
def test_vcov_names_variances_beyond_double_precision(scale, entry):
    # rescaling a regressor by s divides its coefficient and standard error by s (a fact of the
    # trade: least squares is equivariant to the units of a column); at s = 1e-170 the variance
    # (about 1e338) overflows, at 1e200 (about 1e-402) it underflows
    rng = np.random.default_rng(11)
    T = 60
    X1 = np.column_stack([np.ones(T), rng.normal(size=T)])
    X2 = np.column_stack([np.ones(T), rng.normal(size=T)])
    e = rng.normal(size=(T, 2)) @ np.array([[1.0, 0.5], [0.0, 0.8]])
    y1, y2 = X1 @ [1.0, 2.0] + e[:, 0], X2 @ [0.5, -1.0] + e[:, 1]
    plain = blocksur.EquationSystem({"a": (y1, X1), "b": (y2, X2)}).fit("fgls")
    with warnings.catch_warnings():
        warnings.simplefilter("error")
        plain.vcov  # in range: no warning
    scaled = blocksur.EquationSystem({"a": (y1, X1 * [1.0, scale]), "b": (y2, X2)}).fit("fgls")
    with pytest.warns(blocksur.VarianceRangeWarning, match=r"variances of a::x1 are beyond double") as rec:
        v = scaled.vcov
    assert rec[0].filename == __file__  # attributed to the line that read vcov
    assert v.loc[("a", "x1"), ("a", "x1")] == entry
    np.testing.assert_allclose(scaled.se[("a", "x1")], plain.se[("a", "x1")] / scale, rtol=1e-10)
    np.testing.assert_allclose(scaled.coef[("a", "x1")], plain.coef[("a", "x1")] / scale, rtol=1e-10)
    # the other coefficients' covariance is unchanged
    others = [("a", "x0"), ("b", "x0"), ("b", "x1")]
    np.testing.assert_allclose(v.loc[others, others], plain.vcov.loc[others, others], rtol=1e-10)
