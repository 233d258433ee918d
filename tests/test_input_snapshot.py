"""What a system keeps of its input, and how the constructor and ``fit`` check what they are
given: the data snapshot (``copy=True``, made once; ``copy=False`` keeps references), stored
arrays read-only, pandas row indexes that must agree, subnormal regressors, option types and
ranges, and regressor names from a named Series.

Outside references: statsmodels' dense GLS on the textbook formula (``reference.dense_fgls``)
and statsmodels OLS on the unedited data; the definitions of residuals (y - X b) and of the sum
of squared residuals; numpy's own memory checks (``np.shares_memory``, ``tracemalloc``)."""

from __future__ import annotations

import copy
import pickle
import tracemalloc
import warnings

import numpy as np
import pandas as pd
import pytest
import statsmodels.api as sm

import blocksur
import blocksur.errors as errors
from reference import dense_fgls, record

T = 80


def _data(seed: int = 5):
    rng = np.random.default_rng(seed)
    X1 = np.column_stack([np.ones(T), rng.normal(size=T)])
    X2 = np.column_stack([np.ones(T), rng.normal(size=(T, 2))])
    e = rng.multivariate_normal([0, 0], [[1.0, 0.6], [0.6, 1.5]], size=T)
    y1 = X1 @ [1.0, 2.0] + e[:, 0]
    y2 = X2 @ [0.5, -1.0, 1.0] + e[:, 1]
    return y1, X1, y2, X2


# ---------------------------------------------------------------------------
# F1: the system owns a snapshot of its data


@pytest.mark.parametrize("edit", ["y", "X"])
def test_editing_the_inputs_after_a_fit_changes_nothing(edit):
    y1, X1, y2, X2 = _data()
    ya, Xa = y1.copy(), X1.copy()  # float64, C order: the arrays kept by reference before
    system = blocksur.EquationSystem({"a": (ya, Xa), "b": (y2, X2)})
    f1 = system.fit("fgls")
    if edit == "y":
        ya += 100 * np.sin(np.arange(T))
    else:
        Xa[:, 1] *= 3.0
    f2 = system.fit("fgls")
    # reference: statsmodels dense GLS (textbook FGLS) on the data as given, before the edit
    b_ref, _, _ = dense_fgls({"a": (y1, X1), "b": (y2, X2)}, "ml")
    for f in (f1, f2):  # f1's residuals are computed lazily, after the edit
        np.testing.assert_allclose(f.coef.to_numpy(), b_ref, rtol=1e-10, atol=0)
        record("snapshot: fgls after an input edit vs statsmodels dense GLS (max rel)",
               np.max(np.abs(f.coef.to_numpy() - b_ref) / np.abs(b_ref)))
        # definition: resid = y - X b on the original data; ssr = sum of squared residuals
        np.testing.assert_allclose(f.resid["a"].to_numpy(), y1 - X1 @ f.coef["a"].to_numpy(),
                                   rtol=0, atol=1e-12 * np.abs(y1).max())
        for name in ("a", "b"):
            np.testing.assert_allclose((f.resid[name] ** 2).sum(), f.ssr[name], rtol=1e-12)
        np.testing.assert_allclose(f.fitted["a"] + f.resid["a"], y1, rtol=1e-14, atol=1e-13)
    np.testing.assert_array_equal(f1.coef, f2.coef)
    np.testing.assert_array_equal(f1.resid, f2.resid)


def test_ols_after_an_edit_matches_statsmodels_on_the_original_data():
    y1, X1, y2, X2 = _data(8)
    ya = y1.copy()
    system = blocksur.EquationSystem({"a": (ya, X1), "b": (y2, X2)})
    system.fit("ols")
    ya[:] = 0.0
    fit = system.fit("ols")
    ref = sm.OLS(y1, X1).fit()  # reference: statsmodels OLS on the unedited data
    np.testing.assert_allclose(fit.coef["a"].to_numpy(), ref.params, rtol=1e-12)
    np.testing.assert_allclose(fit.ssr["a"], ref.ssr, rtol=1e-12)
    np.testing.assert_allclose((fit.resid["a"] ** 2).sum(), ref.ssr, rtol=1e-12)


def _input_forms():
    y1, X1, y2, X2 = _data(11)
    big = np.asfortranarray(np.column_stack([X1, X1[:, 1] ** 2]))
    return {
        "float64 C": (y1.copy(), X1.copy()),
        "Fortran": (y1.copy(), np.asfortranarray(X1)),
        "strided view": (np.repeat(y1, 2)[::2], big[:, :2]),
        "int": (np.round(10 * y1).astype(np.int64), np.round(10 * X1).astype(np.int32)),
        "list": (y1.tolist(), X1.tolist()),
        "pandas": (pd.Series(y1.copy()), pd.DataFrame(X1.copy(), columns=["c", "p"])),
        "pandas mixed dtypes": (
            pd.Series(y1.copy()),
            pd.DataFrame({"c": np.ones(T, dtype=np.int64), "p": X1[:, 1].copy()}),
        ),
    }


@pytest.mark.parametrize("form", list(_input_forms()))
def test_copy_true_shares_no_memory_and_stores_read_only_arrays(form):
    y, X = _input_forms()[form]
    y2, X2 = _data(12)[2:]
    system = blocksur.EquationSystem({"a": (y, X), "b": (y2, X2)})
    ys, xs = system._ys[0], system._xs[0]
    for stored, given in ((ys, y), (xs, X)):
        assert stored.dtype == np.float64
        assert not stored.flags.writeable
        if not isinstance(given, list):
            assert not np.shares_memory(stored, np.asarray(given))
    with pytest.raises(ValueError, match="read-only"):
        xs[0, 0] = 1.0
    # the caller's arrays keep their flags
    for given in (y, X, y2, X2):
        if isinstance(given, np.ndarray):
            assert given.flags.writeable
    # same numbers as the plain float64 C input (definition: the copy is the data)
    ref = blocksur.EquationSystem(
        {"a": (np.array(y, dtype=float), np.array(X, dtype=float)), "b": (y2, X2)}
    ).fit("fgls")
    np.testing.assert_allclose(system.fit("fgls").coef, ref.coef, rtol=1e-13)


def test_copy_true_keeps_the_memory_order():
    y1, X1, y2, X2 = _data()
    system = blocksur.EquationSystem({"a": (y1, np.asfortranarray(X1)), "b": (y2, X2)})
    assert system._xs[0].flags.f_contiguous and system._xs[1].flags.c_contiguous


@pytest.mark.parametrize("kind", ["float64", "int64", "mixed DataFrame"])
def test_the_snapshot_is_made_once(kind):
    # A conversion that already makes a new array is not copied again: the memory taken while
    # building the system is one float64 copy of X (numpy reports its buffers to tracemalloc).
    n, k = 200_000, 4
    rng = np.random.default_rng(1)
    if kind == "float64":
        X = rng.normal(size=(n, k))
    elif kind == "int64":
        X = rng.integers(-5, 5, size=(n, k))
    else:
        X = pd.DataFrame({f"c{j}": (rng.integers(0, 5, n) if j == 0 else rng.normal(size=n))
                          for j in range(k)})
    y = rng.normal(size=n)
    one_copy = 8 * n * k
    tracemalloc.start()
    try:
        tracemalloc.reset_peak()
        system = blocksur.EquationSystem({"a": (y, X)})
        _, peak = tracemalloc.get_traced_memory()
    finally:
        tracemalloc.stop()
    # X once and y once (8 n bytes); a second copy of X would add another 8 n k
    assert one_copy <= peak < one_copy + 8 * n + one_copy // 2, peak / one_copy
    assert system._xs[0].shape == (n, k)


def test_copy_false_keeps_references_to_float64_arrays():
    y1, X1, y2, X2 = _data()
    ya, Xa = y1.copy(), X1.copy()
    Xi = np.round(10 * X2).astype(np.int64)
    system = blocksur.EquationSystem({"a": (ya, Xa), "b": (y2, Xi)}, copy=False)
    # documented: float64 arrays are kept by reference (read-only views); others are converted
    assert np.shares_memory(system._ys[0], ya) and np.shares_memory(system._xs[0], Xa)
    assert not np.shares_memory(system._xs[1], Xi)
    assert not system._ys[0].flags.writeable and not system._xs[0].flags.writeable
    assert ya.flags.writeable and Xa.flags.writeable  # the caller's arrays are not frozen
    # kept by reference: an edit made before any fit is what the fit reads (the docstring asks
    # not to edit them while the system or its fits are in use)
    ya += 1.0
    fit = system.fit("ols")
    ref = sm.OLS(y1 + 1.0, X1).fit()  # reference: statsmodels OLS on the edited data
    np.testing.assert_allclose(fit.coef["a"].to_numpy(), ref.params, rtol=1e-12)


def test_copy_is_keyword_only_and_a_bool():
    y1, X1, y2, X2 = _data()
    eqs = {"a": (y1, X1), "b": (y2, X2)}
    names = {"a": ["const", "p"], "b": ["const", "p", "q"]}
    assert blocksur.EquationSystem(eqs, names).regressor_names == names  # positional names
    with pytest.raises(TypeError):
        blocksur.EquationSystem(eqs, names, False)
    with pytest.raises(errors.InvalidOptionError, match="copy must be True or False"):
        blocksur.EquationSystem(eqs, copy="no")


def test_pickled_and_copied_systems_stay_read_only():
    y1, X1, y2, X2 = _data()
    system = blocksur.EquationSystem({"a": (y1, X1), "b": (y2, X2)})
    fit = system.fit("ifgls")
    for other in (pickle.loads(pickle.dumps(system)), copy.deepcopy(system)):
        assert not any(a.flags.writeable for a in other._ys + other._xs)
        np.testing.assert_array_equal(other.fit("ifgls").coef, fit.coef)
    restored = blocksur.FittedSystem.from_dict(fit.to_dict(keep_data=True))
    np.testing.assert_array_equal(restored.coef, fit.coef)


def test_from_table_shares_no_memory_with_the_table():
    rng = np.random.default_rng(4)
    n = 120
    table = pd.DataFrame({"y1": rng.normal(size=n), "y2": rng.normal(size=n),
                          "x1": rng.normal(size=n), "x2": rng.normal(size=n)})
    system = blocksur.EquationSystem.from_table(
        table, {"a": "y1 ~ x1", "b": ("y2", ["x1", "x2"])}, constant=True
    )
    columns = [table[c].to_numpy() for c in table.columns]
    for arr in system._ys + system._xs:
        assert not arr.flags.writeable
        assert not any(np.shares_memory(arr, col) for col in columns)
    before = system.fit("fgls").coef
    table.loc[:, "y1"] = 0.0
    np.testing.assert_array_equal(system.fit("fgls").coef, before)


# ---------------------------------------------------------------------------
# F6: pandas row indexes must agree


def test_y_and_x_with_different_indexes_are_refused():
    y1, X1, y2, X2 = _data()
    ys = pd.Series(y1, index=range(T))
    Xd = pd.DataFrame(X1, index=range(T)[::-1], columns=["c", "p"])
    with pytest.raises(errors.ShapeMismatchError, match="equation 'a'.*indexes of y and X differ"
                       ".*by position") as info:
        blocksur.EquationSystem({"a": (ys, Xd), "b": (y2, X2)})
    assert info.value.equation == "a"
    # the remedy the message names: aligned by label, the fit is that of the aligned arrays
    fit = blocksur.EquationSystem({"a": (ys, Xd.loc[ys.index]), "b": (y2, X2)}).fit("ols")
    # reference: statsmodels OLS on the rows paired by label (Xd's label t holds X1[T - 1 - t])
    ref = sm.OLS(y1, X1[::-1]).fit()
    np.testing.assert_allclose(fit.coef["a"].to_numpy(), ref.params, rtol=1e-12)
    # reset: paired by position, as plain arrays
    fit = blocksur.EquationSystem({"a": (ys, Xd.reset_index(drop=True)), "b": (y2, X2)}).fit("ols")
    np.testing.assert_allclose(fit.coef["a"].to_numpy(), sm.OLS(y1, X1).fit().params, rtol=1e-12)


def test_equations_with_different_indexes_are_refused():
    y1, X1, y2, X2 = _data()
    dates = pd.date_range("2024-01-01", periods=T, freq="D")
    eqs = {
        "a": (pd.Series(y1, index=dates), X1),
        "b": (pd.Series(y2, index=dates + pd.Timedelta(days=1)), X2),
    }
    with pytest.raises(errors.ShapeMismatchError,
                       match="equation 'b': its row index differs from that of equation 'a'") as info:
        blocksur.EquationSystem(eqs)
    assert info.value.equation == "b"
    # X of another equation counts too
    eqs = {"a": (pd.Series(y1, index=dates), X1),
           "b": (y2, pd.DataFrame(X2, index=dates[::-1]))}
    with pytest.raises(errors.ShapeMismatchError, match="equation 'b'.*equation 'a'"):
        blocksur.EquationSystem(eqs)


def test_identical_indexes_work_and_label_the_rows():
    y1, X1, y2, X2 = _data()
    dates = pd.date_range("2024-01-01", periods=T, freq="D")
    eqs = {
        "a": (pd.Series(y1, index=dates), pd.DataFrame(X1, index=dates.copy(), columns=["c", "p"])),
        "b": (pd.Series(y2, index=pd.DatetimeIndex(list(dates))), X2),  # plain array X: no index
    }
    fit = blocksur.EquationSystem(eqs).fit("fgls")
    assert fit.resid.index.equals(dates)
    ref = blocksur.EquationSystem({"a": (y1, X1), "b": (y2, X2)}).fit("fgls")
    np.testing.assert_array_equal(fit.coef.to_numpy(), ref.coef.to_numpy())


def test_the_same_instants_in_other_time_zones_are_the_same_rows():
    y1, X1, y2, X2 = _data()
    hours = pd.date_range("2024-03-30 20:00", periods=T, freq="h", tz="UTC")  # spans a DST change
    berlin = hours.tz_convert("Europe/Berlin")
    eqs = {
        "a": (pd.Series(y1, index=hours), pd.DataFrame(X1, index=berlin, columns=["c", "p"])),
        "b": (pd.Series(y2, index=hours.tz_convert("America/New_York")), X2),
    }
    fit = blocksur.EquationSystem(eqs).fit("fgls")
    # rows are labelled by the first index seen, in its own zone
    assert fit.resid.index.equals(hours) and str(fit.resid.index.tz) == "UTC"
    ref = blocksur.EquationSystem({"a": (y1, X1), "b": (y2, X2)}).fit("fgls")
    np.testing.assert_array_equal(fit.coef.to_numpy(), ref.coef.to_numpy())
    # other instants, or naive against aware, still differ
    for other in (hours + pd.Timedelta(hours=1), hours.tz_localize(None)):
        with pytest.raises(errors.ShapeMismatchError, match="equation 'b': its row index differs"):
            blocksur.EquationSystem({"a": (pd.Series(y1, index=hours), X1),
                                     "b": (pd.Series(y2, index=other), X2)})


# ---------------------------------------------------------------------------
# F3: subnormal regressors


@pytest.mark.parametrize("scale, column", [([1e-310, 1e-310], "c"), ([1.0, 1e-310], "p")])
def test_subnormal_regressors_raise_a_typed_error(scale, column):
    y1, X1, y2, X2 = _data()
    Xd = pd.DataFrame(X1 * scale, columns=["c", "p"])
    for method in ("ols", "fgls"):
        system = blocksur.EquationSystem({"a": (y1, Xd), "b": (y2, X2)})
        # a blocksur data error (so a ValueError), never the OverflowError it used to be; the
        # compiled core may refuse such columns itself (same class), else the Python layer does
        with pytest.raises(errors.InputError, match="subnormal.*rescale") as info:
            system.fit(method)
        assert isinstance(info.value, ValueError) and not isinstance(info.value, OverflowError)
        assert info.value.equation == "a" and f"regressor '{column}'" in str(info.value)


def test_small_but_representable_regressors_still_fit():
    y1, X1, y2, X2 = _data()
    with warnings.catch_warnings():
        warnings.simplefilter("error")  # no warning either: the columns are scaled
        fit = blocksur.EquationSystem({"a": (y1, X1 * [1.0, 1e-150]), "b": (y2, X2)}).fit("ols")
    ref = sm.OLS(y1, X1).fit()  # reference: statsmodels OLS, slope rescaled by definition
    np.testing.assert_allclose(fit.coef["a"].to_numpy(), ref.params * [1.0, 1e150], rtol=1e-12)


# ---------------------------------------------------------------------------
# F9: option checks


@pytest.fixture(scope="module")
def system():
    y1, X1, y2, X2 = _data()
    return blocksur.EquationSystem({"a": (y1, X1), "b": (y2, X2)})


BAD_FIT_OPTIONS = [
    ("cg_max_iter", -1, "whole number from 1 to"),
    ("cg_max_iter", 0, "whole number from 1 to"),
    ("cg_max_iter", 10**30, "largest count"),
    ("cg_max_iter", True, "an int, not bool"),
    ("cg_max_iter", 2.5, "an int, not float"),
    ("max_iter", 10**30, "largest count"),
    ("max_iter", 2**64, "largest count"),  # one beyond the core's usize
    ("max_iter", True, "an int, not bool"),
    ("cg_tol", "a", r"finite number > 0, not str"),
    ("cg_tol", 0.0, r"finite number > 0"),
    ("cg_tol", float("nan"), r"finite number > 0"),
    ("cg_tol", float("inf"), r"finite number > 0"),
    ("memory_limit", "a", r"finite number > 0 of bytes, or None"),
    ("memory_limit", float("nan"), r"finite number > 0 of bytes"),
    ("memory_limit", -1, r"finite number > 0 of bytes"),
    ("memory_limit", 0, r"finite number > 0 of bytes"),
    ("memory_limit", True, r"not bool"),
    ("tol", True, r"finite number >= 0, not bool"),
    ("tol", "1e-3", r"finite number >= 0, not str"),
    ("tol", -1.0, r"finite number >= 0"),
]


@pytest.mark.parametrize("option, value, allowed", BAD_FIT_OPTIONS,
                         ids=[f"{o}={v!r}" for o, v, _ in BAD_FIT_OPTIONS])
def test_bad_fit_options_raise_invalid_option_error(system, option, value, allowed):
    with pytest.raises(errors.InvalidOptionError, match=rf"^{option} must be .*{allowed}"):
        system.fit("ifgls", **{option: value})


def test_good_fit_options_of_numpy_types_are_accepted(system):
    fit = system.fit("ifgls", max_iter=np.int64(50), tol=np.float32(1e-8), cg_tol=1,
                     cg_max_iter=np.uint64(10), memory_limit=np.int64(10**9))
    assert fit.max_iter == 50 and fit.converged
    ref = system.fit("ifgls", tol=1e-8)  # same fit with plain Python numbers
    np.testing.assert_array_equal(fit.coef, ref.coef)


@pytest.mark.parametrize(
    "names, where",
    [
        (5, "regressor_names must be a dict"),
        ("ab", "regressor_names must be a dict"),
        ({"b": "cpq"}, r"regressor_names\['b'\] must be a list of names.*not the string 'cpq'"),
        ({"a": 5}, r"regressor_names\['a'\] must be a list of names"),
        ([["c", "p"], "cpq"], r"regressor_names\[1\] \(equation 'b'\) must be a list of names"),
    ],
)
def test_bad_regressor_names_raise_invalid_option_error(names, where):
    y1, X1, y2, X2 = _data()
    with pytest.raises(errors.InvalidOptionError, match=where):
        blocksur.EquationSystem({"a": (y1, X1), "b": (y2, X2)}, regressor_names=names)


def test_regressor_names_as_tuples_and_indexes_still_work():
    y1, X1, y2, X2 = _data()
    system = blocksur.EquationSystem(
        {"a": (y1, X1), "b": (y2, X2)},
        regressor_names=[("const", "p"), pd.Index(["const", "p", "q"])],
    )
    assert system.regressor_names == {"a": ["const", "p"], "b": ["const", "p", "q"]}


# ---------------------------------------------------------------------------
# F11: a named Series as X


def test_a_named_series_x_names_its_regressor():
    y1, X1, y2, X2 = _data()
    system = blocksur.EquationSystem({"a": (y1, pd.Series(X1[:, 1], name="price")),
                                      "b": (y2, pd.Series(X2[:, 1]))})
    assert system.regressor_names == {"a": ["price"], "b": ["x0"]}  # unnamed: the default
    fit = system.fit("ols")
    ref = sm.OLS(y1, X1[:, 1]).fit()  # reference: statsmodels OLS, one regressor, no constant
    np.testing.assert_allclose(fit.coef[("a", "price")], ref.params[0], rtol=1e-12)
    # explicit names still win
    named = blocksur.EquationSystem({"a": (y1, pd.Series(X1[:, 1], name="price"))},
                                    regressor_names={"a": ["p"]})
    assert named.regressor_names == {"a": ["p"]}


def test_empty_arrays_of_the_caller_keep_their_flags():
    """An empty array shares memory with nothing (numpy says so), so the snapshot leaves it as
    it is: the system must still not freeze the caller's own array object, only its view."""
    y, X = np.zeros(0), np.zeros((0, 2))
    system = blocksur.EquationSystem({"a": (y, X), "b": (np.zeros(0), np.zeros((0, 1)))})
    assert y.flags.writeable and X.flags.writeable
    assert not system._ys[0].flags.writeable and not system._xs[0].flags.writeable
