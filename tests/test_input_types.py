"""Values that numpy would read as numbers but are not quantities, refused with the equation (and
the column) and what to do: durations (``timedelta64``, integers to numpy), pandas categoricals,
complex new data in ``predict`` / ``prediction_se`` (numpy only warns and drops the imaginary
part), a formula without a dependent variable; and MultiIndex columns as regressor names.

Outside references: statsmodels OLS on the same data as a plain array; the definition of
a fitted value (X b)."""

from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

import blocksur
import blocksur.errors as errors
from reference import make_sur_data

T = 60


def _data(seed: int = 11):
    # y1, X1 (constant and one regressor), y2, X2 (constant and two)
    (y1, X1), (y2, X2) = make_sur_data(seed, T=T, ks=(2, 3)).values()
    return y1, X1, y2, X2


@pytest.fixture(scope="module")
def fit():
    y1, X1, y2, X2 = _data()
    return blocksur.EquationSystem({"north": (y1, X1), "south": (y2, X2)}).fit("fgls")


# ---------------------------------------------------------------------------
# durations and dates


@pytest.mark.parametrize("side", ["y", "X"])
@pytest.mark.parametrize("kind", ["m8[s]", "M8[D]"])
def test_durations_and_dates_are_refused(side, kind):
    y1, X1, y2, X2 = _data()
    if side == "X":
        bad = (y1, np.column_stack([np.ones(T), np.arange(T)]).astype(kind))
    else:
        bad = (np.arange(T).astype(kind), X1)
    with pytest.raises(errors.ShapeMismatchError) as info:
        blocksur.EquationSystem({"south": (y2, X2), "north": bad})
    assert info.value.equation == "north"
    msg = str(info.value)
    assert "equation 'north'" in msg and kind.split("[")[0].replace("m8", "timedelta64").replace(
        "M8", "datetime64") in msg
    assert "np.timedelta64" in msg  # says how to make numbers of them


def test_a_duration_column_of_a_dataframe_is_refused():
    y1, X1, y2, X2 = _data()
    X = pd.DataFrame({"const": 1.0, "wait": pd.to_timedelta(np.arange(T), unit="s")})
    with pytest.raises(errors.ShapeMismatchError, match="equation 'north'.*timedelta64"):
        blocksur.EquationSystem({"north": (y1, X), "south": (y2, X2)})


@pytest.mark.parametrize("column", ["wait", "day"])
def test_durations_and_dates_are_refused_by_from_table(column):
    y1, X1, y2, X2 = _data()
    table = pd.DataFrame({"y": y1, "x": X1[:, 1], "wait": pd.to_timedelta(np.arange(T), unit="s"),
                          "day": pd.date_range("2024-01-01", periods=T)})
    kind = {"wait": "timedelta64", "day": "datetime64"}[column]
    with pytest.raises(errors.InputError, match=f"equation 'north': column '{column}'.*{kind}") as info:
        blocksur.EquationSystem.from_table(table, {"north": ("y", ["x", column])}, constant=True)
    assert (info.value.equation, info.value.column) == ("north", column)
    assert "np.timedelta64" in str(info.value) and "C(" not in str(info.value)  # not categories


# ---------------------------------------------------------------------------
# pandas categoricals


def test_a_categorical_regressor_column_is_refused():
    y1, X1, y2, X2 = _data()
    X = pd.DataFrame({"const": 1.0, "zone": pd.Categorical(np.arange(T) % 3)})  # numeric categories
    with pytest.raises(errors.ShapeMismatchError) as info:
        blocksur.EquationSystem({"north": (y1, X), "south": (y2, X2)})
    err = info.value
    assert (err.equation, err.column) == ("north", "zone")
    msg = str(err)
    assert "equation 'north'" in msg and "'zone'" in msg
    assert "encoded" in msg and "from_table" in msg and "C(zone)" in msg


def test_a_categorical_series_x_or_y_is_refused():
    y1, X1, y2, X2 = _data()
    zone = pd.Series(pd.Categorical(np.arange(T) % 3), name="zone")
    with pytest.raises(errors.ShapeMismatchError, match="equation 'north': column 'zone'.*C\\(zone\\)"):
        blocksur.EquationSystem({"north": (y1, zone), "south": (y2, X2)})
    with pytest.raises(errors.ShapeMismatchError, match="equation 'north': the dependent variable is a pandas categorical") as info:
        blocksur.EquationSystem({"north": (pd.Series(pd.Categorical(np.arange(T) % 2)), X1), "south": (y2, X2)})
    assert info.value.equation == "north"


def test_categorical_columns_in_from_table():
    y1, X1, y2, X2 = _data()
    table = pd.DataFrame({"y": y1, "x": X1[:, 1], "zone": pd.Categorical(np.arange(T) % 3)})
    # the pair form takes columns as they are: a categorical is refused, naming the formula way
    with pytest.raises(errors.InputError, match="equation 'north': column 'zone'.*C\\(zone\\)") as info:
        blocksur.EquationSystem.from_table(table, {"north": ("y", ["x", "zone"])}, constant=True)
    assert (info.value.equation, info.value.column) == ("north", "zone")
    # as the dependent variable: no dummies offered
    with pytest.raises(errors.InputError, match="equation 'north': column 'zone'.*dependent variable must be real") as info:
        blocksur.EquationSystem.from_table(table, {"north": ("zone", ["x"])}, constant=True)
    assert "C(zone)" not in str(info.value)
    # a formula encodes it
    system = blocksur.EquationSystem.from_table(table, {"north": "y ~ x + C(zone)"})
    assert system.regressor_names["north"] == ["Intercept", "x", "C(zone)[T.1]", "C(zone)[T.2]"]


# ---------------------------------------------------------------------------
# new data in predict / prediction_se


@pytest.mark.parametrize("method", ["predict", "prediction_se"])
@pytest.mark.parametrize("make", [
    lambda x: x.astype(complex),
    lambda x: x + 1e-3j,
    lambda x: x.astype(str),
    lambda x: x.astype(object),
    lambda x: x.astype("m8[s]"),
], ids=["complex", "complex-imaginary", "strings", "objects", "durations"])
def test_predict_refuses_values_that_are_not_real_numbers(fit, method, make):
    y1, X1, y2, X2 = _data()
    new = {"north": X1[:4], "south": make(X2[:4])}
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # no ComplexWarning on the way to the error
        with pytest.raises(errors.ShapeMismatchError, match="equation 'south'") as info:
            getattr(fit, method)(new)
    assert info.value.equation == "south"


@pytest.mark.parametrize("dtype", [complex, "category", "string"])
def test_predict_names_the_column_of_a_dataframe_that_is_not_numbers(fit, dtype):
    y1, X1, y2, X2 = _data()
    new = pd.DataFrame(X2[:4], columns=["x0", "x1", "x2"]).astype({"x2": dtype})
    with pytest.raises(errors.ShapeMismatchError, match="equation 'south'.*'x2'") as info:
        fit.predict({"north": X1[:4], "south": new})
    assert (info.value.equation, info.value.column) == ("south", "x2")


def test_predict_still_takes_real_new_data(fit):
    y1, X1, y2, X2 = _data()
    nullable = pd.DataFrame(X2[:4], columns=["x0", "x1", "x2"]).astype({"x0": "Int64"})
    got = fit.predict({"north": X1[:4].tolist(), "south": nullable})
    b = fit.coef
    # definition: fitted value X b
    np.testing.assert_allclose(got["south"].to_numpy(), X2[:4] @ b["south"].to_numpy(), rtol=1e-12)
    np.testing.assert_allclose(got["north"].to_numpy(), X1[:4] @ b["north"].to_numpy(), rtol=1e-12)


def test_predict_refuses_complex_columns_of_a_table_built_system():
    y1, X1, y2, X2 = _data()
    table = pd.DataFrame({"y1": y1, "y2": y2, "x": X1[:, 1], "p": X2[:, 1], "q": X2[:, 2]})
    fit = blocksur.EquationSystem.from_table(
        table, {"north": ("y1", ["x"]), "south": ("y2", ["p", "q"])}, constant=True).fit("fgls")
    with pytest.raises(errors.InputError, match="equation 'south': column 'q' has complex values") as info:
        fit.predict(table.iloc[:3].assign(q=table.q[:3] + 1j))
    assert (info.value.equation, info.value.column) == ("south", "q")


# ---------------------------------------------------------------------------
# from_table: a formula without a dependent variable


@pytest.mark.parametrize("formula", ["~ x", "  ~ x + 1", "~"])
def test_a_formula_without_a_dependent_variable(formula):
    y1, X1, y2, X2 = _data()
    table = pd.DataFrame({"y": y1, "x": X1[:, 1]})
    with pytest.raises(errors.FormulaError) as info:
        blocksur.EquationSystem.from_table(table, {"north": formula})
    err = info.value
    assert (err.equation, err.formula) == ("north", formula)
    msg = str(err)
    assert "equation 'north'" in msg and "no dependent variable" in msg and "left of '~'" in msg
    assert "SimpleFormula" not in msg and "attribute" not in msg  # no formulaic internals


# ---------------------------------------------------------------------------
# MultiIndex columns: levels joined with "_"


def test_multiindex_columns_name_regressors_by_their_joined_levels(fit):
    y1, X1, y2, X2 = _data()
    columns = pd.MultiIndex.from_tuples([("const", ""), ("price", "mean"), ("price", "max")])
    X = pd.DataFrame(X2, columns=columns)
    system = blocksur.EquationSystem({"north": (y1, X1), "south": (y2, X)})
    assert system.regressor_names["south"] == ["const", "price_mean", "price_max"]
    got = system.fit("ols")
    ref = sm.OLS(y2, X2).fit()  # reference: statsmodels OLS on the flat array
    np.testing.assert_allclose(got.coef["south"].to_numpy(), ref.params, rtol=1e-10)
    # the names work in restrictions and a new frame with the same columns predicts
    assert got.wald("south::price_mean = 0").statistic > 0
    new = pd.DataFrame(X2[:3], columns=columns)
    np.testing.assert_allclose(got.predict({"north": X1[:3], "south": new})["south"].to_numpy(),
                               got.fitted["south"].to_numpy()[:3], rtol=1e-12)
    # a Series taken from such a frame is named the same way
    one = blocksur.EquationSystem({"south": (y2, X[("price", "mean")])})
    assert one.regressor_names == {"south": ["price_mean"]}


def test_dataframe_of_mixed_numeric_column_dtypes_is_read_as_numbers():
    """A regressor frame mixing float, bool (what pd.get_dummies returns) and nullable Int64
    columns: numpy alone makes one array of objects of it (it was refused); the fit equals
    statsmodels OLS on the same values as a float array (reference: statsmodels OLS)."""
    import statsmodels.api as sm

    rng = np.random.default_rng(11)
    T = 80
    zone = rng.choice(["n", "s", "w"], size=T)
    X = pd.concat(
        [
            pd.DataFrame({"const": 1.0, "x": rng.normal(size=T)}),
            pd.get_dummies(pd.Series(zone), prefix="zone", drop_first=True),
            pd.DataFrame({"k": pd.array(rng.integers(0, 5, size=T), dtype="Int64")}),
        ],
        axis=1,
    )
    Xf = X.to_numpy(dtype=float)
    y = Xf @ [1.0, 0.5, -0.3, 0.2, 0.1] + rng.normal(size=T)
    y2 = rng.normal(size=T)
    fit = blocksur.EquationSystem({"a": (y, X), "b": (y2, X[["const", "x"]])}).fit("ols", omega="dof")
    assert list(fit.coef["a"].index) == ["const", "x", "zone_s", "zone_w", "k"]
    np.testing.assert_allclose(fit.coef["a"].to_numpy(), sm.OLS(y, Xf).fit().params, rtol=1e-12)
    # a missing value in a nullable column is reported with its row, not read as a number
    Xm = X.copy()
    Xm.loc[7, "k"] = pd.NA
    with pytest.raises(blocksur.errors.NonFiniteError) as info:
        blocksur.EquationSystem({"a": (y, Xm), "b": (y2, X[["const", "x"]])}).fit("ols")
    assert info.value.row == 7 and info.value.equation == "a"


def test_restriction_arrays_must_hold_real_numbers():
    rng = np.random.default_rng(2)
    T = 40
    X = np.column_stack([np.ones(T), rng.normal(size=T)])
    system = blocksur.EquationSystem({"a": (rng.normal(size=T), X), "b": (rng.normal(size=T), X)})
    R = np.array([[0, 1, 0, -1]], dtype=complex)
    for bad in ((R, np.zeros(1)), (np.array([["0", "1", "0", "-1"]]), np.zeros(1)), (R.real, np.array(["0"]))):
        with pytest.raises(blocksur.errors.RestrictionError, match="real numbers"):
            system.fit("fgls", restrictions=bad)
    fit = system.fit("fgls")
    with pytest.raises(blocksur.errors.RestrictionError, match="real numbers"):
        fit.wald((R, np.zeros(1)))


def test_column_labels_that_become_the_same_name_are_refused_at_construction():
    """Two labels that name one regressor once made strings and joined (('price', 'mean') and
    ('price_mean', ''); 0 and '0'): refused when the system is built, naming the labels (the
    fit had failed later with 'appears twice' and no word of where the duplicate came from)."""
    rng = np.random.default_rng(0)
    T = 20
    cases = [
        pd.MultiIndex.from_tuples([("price", "mean"), ("price_mean", "")]),
        pd.Index([0, "0"], dtype=object),
    ]
    for cols in cases:
        X = pd.DataFrame(rng.normal(size=(T, 2)), columns=cols)
        with pytest.raises(errors.ShapeMismatchError, match="appear more than once") as info:
            blocksur.EquationSystem({"a": (rng.normal(size=T), X)})
        assert info.value.equation == "a"
        assert "column labels" in str(info.value)
