"""What the per-call shortcuts of small fits must not change: input conversion (only native
float64 arrays skip it), the (equation, regressor) index shared by systems with the same labels,
and the Series built without pandas' input inference.

Outside references: pandas' public constructors (``pd.Series``, ``pd.MultiIndex.from_tuples``)
and fits of the same data given in other dtypes and byte orders.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

import blocksur
from reference import make_sur_data


def _eqs():
    return make_sur_data(81, T=30, ks=(2, 3, 2))


def test_coef_and_se_equal_the_public_pandas_construction():
    fit = blocksur.EquationSystem(_eqs()).fit("fgls")
    tuples = [(e, r) for e, regs in fit._system.regressor_names.items() for r in regs]
    index = pd.MultiIndex.from_tuples(tuples, names=["equation", "regressor"])
    b = np.asarray(fit._est.coef)
    # (the levels hold Python strings, dtype object, as before; from_tuples infers a string dtype)
    same = dict(check_index_type=False)
    pd.testing.assert_series_equal(fit.coef, pd.Series(b, index=index, name="coef"), check_exact=True, **same)
    se = np.sqrt(np.diag(fit.vcov.to_numpy()))
    pd.testing.assert_series_equal(fit.se, pd.Series(se, index=index, name="se"), rtol=1e-13, atol=0, **same)
    assert fit.coef.index.tolist() == tuples and fit.se.index.equals(index)
    # ordinary pandas behaviour on the results
    assert fit.coef.loc["b"].index.tolist() == ["x0", "x1", "x2"]
    assert (fit.coef / fit.se).name is None
    assert fit.coef.to_frame().columns.tolist() == ["coef"]


def test_index_is_shared_only_between_identical_labels():
    a = blocksur.EquationSystem(_eqs()).fit("ols")
    b = blocksur.EquationSystem(_eqs()).fit("fgls")
    assert a.coef.index is b.coef.index
    other = blocksur.EquationSystem(_eqs(), regressor_names={"a": ["const", "z"]}).fit("ols")
    assert other.coef.index is not a.coef.index
    assert other.coef.index.tolist()[:2] == [("a", "const"), ("a", "z")]
    renamed = blocksur.EquationSystem({"p": _eqs()["a"], "q": _eqs()["b"]}).fit("ols")
    assert renamed.coef.index.get_level_values(0).unique().tolist() == ["p", "q"]


def test_renaming_a_result_index_in_place_does_not_reach_later_fits():
    first = blocksur.EquationSystem(_eqs()).fit("fgls")
    first.coef.index.names = ["eq", "var"]  # pandas allows this in place
    later = blocksur.EquationSystem(_eqs()).fit("fgls")
    assert list(later.coef.index.names) == ["equation", "regressor"]
    assert list(later.se.index.names) == ["equation", "regressor"]


@pytest.mark.parametrize("kind", ["big-endian", "float32", "int", "fortran", "strided", "list", "pandas"])
def test_inputs_that_need_conversion_give_the_same_fit(kind):
    eqs = {n: (y, np.round(X, 3)) for n, (y, X) in _eqs().items()}
    ref = blocksur.EquationSystem(eqs).fit("fgls")

    def convert(a):
        if kind == "big-endian":
            return a.astype(">f8")
        if kind == "float32":
            return a.astype(np.float32).astype(np.float64).astype(np.float32)
        if kind == "int":
            return np.round(a * 1000).astype(np.int64)
        if kind == "fortran":
            return np.asfortranarray(a)
        if kind == "strided":
            wide = np.repeat(a, 2, axis=0)
            return wide[::2]
        if kind == "list":
            return a.tolist()
        return pd.Series(a) if a.ndim == 1 else pd.DataFrame(a, columns=[f"x{j}" for j in range(a.shape[1])])

    got = blocksur.EquationSystem({n: (convert(y), convert(X)) for n, (y, X) in eqs.items()}).fit("fgls")
    if kind in ("big-endian", "fortran", "strided", "list", "pandas"):
        np.testing.assert_allclose(got.coef.to_numpy(), ref.coef.to_numpy(), rtol=1e-12, atol=0)
        np.testing.assert_allclose(got.se.to_numpy(), ref.se.to_numpy(), rtol=1e-12, atol=0)
    elif kind == "int":
        # y and X scaled by 1000: slopes unchanged, intercepts scaled
        scaled = blocksur.EquationSystem(
            {n: (np.round(y * 1000), np.round(X * 1000)) for n, (y, X) in eqs.items()}
        ).fit("fgls")
        np.testing.assert_allclose(got.coef.to_numpy(), scaled.coef.to_numpy(), rtol=1e-12, atol=0)
    else:
        y32 = {n: (convert(y).astype(np.float64), convert(X).astype(np.float64)) for n, (y, X) in eqs.items()}
        np.testing.assert_allclose(
            got.coef.to_numpy(), blocksur.EquationSystem(y32).fit("fgls").coef.to_numpy(), rtol=1e-12, atol=0
        )
    assert got.coef.index.equals(ref.coef.index)


def test_masked_and_object_inputs_are_still_refused():
    y, X = _eqs()["a"]
    masked = np.ma.array(y, mask=np.zeros_like(y, dtype=bool))
    masked[3] = np.ma.masked
    with pytest.raises(blocksur.ShapeMismatchError, match="masked"):
        blocksur.EquationSystem({"a": (masked, X)})
    with pytest.raises(blocksur.ShapeMismatchError, match="dtype object"):
        blocksur.EquationSystem({"a": (y.astype(object), X)})
    with pytest.raises(blocksur.ShapeMismatchError, match="expected"):
        blocksur.EquationSystem({"a": (X, X)})


def test_row_labels_of_results():
    eqs = _eqs()
    plain = blocksur.EquationSystem(eqs).fit("fgls")
    assert plain.resid.index.equals(pd.RangeIndex(30))
    days = pd.date_range("2024-01-01", periods=30, freq="D")
    labelled = {n: (pd.Series(y, index=days), X) for n, (y, X) in eqs.items()}
    fit = blocksur.EquationSystem(labelled).fit("fgls")
    assert fit.resid.index.equals(days) and fit.rows_used.equals(days)


def test_index_cache_stays_bounded_and_correct():
    from blocksur import _fit

    y, X = _eqs()["a"]
    fits = [blocksur.EquationSystem({f"eq{i}": (y, X)}).fit("ols") for i in range(_fit._INDEX_CACHE_SIZE + 10)]
    assert len(_fit._INDEX_CACHE) <= _fit._INDEX_CACHE_SIZE
    for i, fit in enumerate(fits):
        assert fit.coef.index.tolist() == [(f"eq{i}", "x0"), (f"eq{i}", "x1")]
    # an evicted label set is rebuilt, equal to the first one built
    again = blocksur.EquationSystem({"eq0": (y, X)}).fit("ols")
    assert again.coef.index.equals(fits[0].coef.index)
