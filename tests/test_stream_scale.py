"""A dependent variable out of the representable range on the streamed routes (fit_chunks,
fit_parquet, fit_dask).

Outside references: the in-memory fit of the same rows (``EquationSystem(...).fit``), computed in
the test, whose typed refusal (InputError naming the equation) every streamed route must repeat
word for word; and, just inside the range, the rescaling theorem (common practice): y_i times c
multiplies equation i's coefficients and standard errors by c and leaves the other equations' as
they are, for OLS and for FGLS alike (Omega's row and column i scale by c, and GLS is invariant to
that).
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import blocksur
from blocksur.errors import InputError, NonFiniteError, SingularOmegaError
from reference import record
from scale_support import rel

T = 400
SIZES = (100, 37, 163, 100)  # uneven chunks, so that the largest |y| lies in one of them
METHODS = ("ols", "fgls")


def _system(scale: float, which: str = "a") -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """Two seeded equations with correlated errors; equation ``which``'s y times ``scale``."""
    rng = np.random.default_rng(0)
    x1 = np.column_stack([np.ones(T), rng.normal(size=T)])
    x2 = np.column_stack([np.ones(T), rng.normal(size=T)])
    e = rng.normal(size=(T, 2)) @ np.array([[1.0, 0.6], [0.0, 0.8]])
    eqs = {"a": (x1 @ [1.0, 2.0] + e[:, 0], x1), "b": (x2 @ [0.0, 1.0] + e[:, 1], x2)}
    y, x = eqs[which]
    eqs[which] = (y * scale, x)
    return eqs


def _array_chunks(eqs) -> list:
    bounds = np.concatenate([[0], np.cumsum(SIZES)])
    return [
        ([y[a:b] for y, _ in eqs.values()], [x[a:b] for _, x in eqs.values()])
        for a, b in zip(bounds[:-1], bounds[1:])
    ]


def _frame(eqs) -> tuple[pd.DataFrame, dict]:
    cols, spec = {}, {}
    for name, (y, x) in eqs.items():
        cols[f"{name}_y"] = y
        cols[f"{name}_x"] = x[:, 1]
        spec[name] = (f"{name}_y", [f"{name}_x"])
    return pd.DataFrame(cols), spec


def _in_memory_message(eqs, method: str, which: str) -> str:
    # reference: the in-memory route's refusal of the same rows
    with pytest.raises(InputError) as err:
        blocksur.EquationSystem(eqs).fit(method)
    assert f"equation '{which}'" in str(err.value)
    return str(err.value)


def _refused_like_in_memory(call, expected: str, which: str) -> None:
    with pytest.raises(InputError) as err:
        call()
    assert type(err.value) is InputError
    assert str(err.value) == expected
    assert getattr(err.value, "equation", None) == which


@pytest.mark.parametrize("which", ["a", "b"])
@pytest.mark.parametrize("scale", [1e200, 1e-200, 1e307])
@pytest.mark.parametrize("method", METHODS)
def test_chunks_and_parquet_refuse_y_out_of_range_as_in_memory(tmp_path, method, scale, which):
    """Were: OLS with se exactly 0 and omega inf or 0, silently; FGLS blaming an exact fit or a
    variance overflow. 1e307 overflows the chunk factors themselves (||y|| > 1.8e308)."""
    eqs = _system(scale, which)
    expected = _in_memory_message(eqs, method, which)
    assert ("too large" if scale > 1 else "too small") in expected
    _refused_like_in_memory(lambda: blocksur.fit_chunks(_array_chunks(eqs), list(eqs), method=method),
                            expected, which)
    frame, spec = _frame(eqs)
    parts = [frame.iloc[a:b] for a, b in zip(np.cumsum((0,) + SIZES[:-1]), np.cumsum(SIZES))]
    _refused_like_in_memory(lambda: blocksur.fit_chunks(parts, spec, constant=True, method=method), expected, which)
    path = tmp_path / "rows.parquet"
    pq.write_table(pa.Table.from_pandas(frame, preserve_index=False), path, row_group_size=64)
    _refused_like_in_memory(
        lambda: blocksur.fit_parquet(str(path), spec, constant=True, method=method, batch_size=50), expected, which
    )


@pytest.mark.parametrize("scale", [1e100, 1e-100])
@pytest.mark.parametrize("method", METHODS)
def test_chunks_just_inside_the_range_fit_and_rescale(method, scale):
    base = blocksur.EquationSystem(_system(1.0)).fit(method)
    eqs = _system(scale)
    ref = blocksur.EquationSystem(eqs).fit(method)
    fit = blocksur.fit_chunks(_array_chunks(eqs), list(eqs), method=method)
    for name in eqs:
        # reference: the in-memory fit of the same rows, per equation (the two differ by 1e100)
        d = record(f"chunks vs in-memory fit, y_a x {scale:g}, {method}: coef {name} (rel)",
                   rel(fit.coef[name], ref.coef[name]))
        assert d <= 1e-10
        d = record(f"chunks vs in-memory fit, y_a x {scale:g}, {method}: se {name} (rel)",
                   rel(fit.se[name], ref.se[name]))
        assert d <= 1e-10
        # reference: the rescaling theorem (equation a's coefficients and se scale by c)
        c = scale if name == "a" else 1.0
        d = record(f"rescaling theorem, chunks, y_a x {scale:g}, {method}: coef {name} (rel)",
                   rel(fit.coef[name] / c, base.coef[name]))
        assert d <= 1e-10
        d = record(f"rescaling theorem, chunks, y_a x {scale:g}, {method}: se {name} (rel)",
                   rel(fit.se[name] / c, base.se[name]))
        assert d <= 1e-10


def test_zeros_and_missing_values_are_judged_as_before():
    """A y of zeros has largest value 0, which the range check lets pass: OLS fits it with zero
    coefficients (least squares of 0 on X is 0) and FGLS refuses its zero residual variance, as in
    memory. A NaN in a y far out of range is reported as the missing value, where it is, by the
    chunk's own check (before any summary)."""
    eqs = _system(0.0)
    fit = blocksur.fit_chunks(_array_chunks(eqs), list(eqs), method="ols")
    assert np.all(fit.coef["a"].to_numpy() == 0.0)
    ref = blocksur.EquationSystem(eqs).fit("ols")  # reference: the in-memory fit
    assert rel(fit.coef["b"], ref.coef["b"]) <= 1e-10
    with pytest.raises(SingularOmegaError, match="equation 'a'"):
        blocksur.fit_chunks(_array_chunks(eqs), list(eqs), method="fgls")

    eqs = _system(1e200)
    eqs["a"][0][150] = np.nan
    with pytest.raises(NonFiniteError, match="row 150") as err:
        blocksur.fit_chunks(_array_chunks(eqs), list(eqs), missing="raise")
    assert err.value.equation == "a"


@pytest.mark.parametrize("scale", [1e200, 1e-200, 1e307])
@pytest.mark.parametrize("method", METHODS)
def test_dask_refuses_y_out_of_range_as_in_memory(method, scale):
    """The Dask route checks the merged pass-1 summary before its second pass (at 1e307 the
    second pass could not even run: the factors overflow) and again when it finishes."""
    da = pytest.importorskip("dask.array")
    dd = pytest.importorskip("dask.dataframe")
    eqs = _system(scale, "b")
    expected = _in_memory_message(eqs, method, "b")
    ys = [da.from_array(y, chunks=SIZES) for y, _ in eqs.values()]
    xs = [da.from_array(x, chunks=(SIZES, -1)) for _, x in eqs.values()]
    _refused_like_in_memory(
        lambda: blocksur.fit_dask((ys, xs), list(eqs), method=method, scheduler="synchronous"), expected, "b"
    )
    frame, spec = _frame(eqs)
    ddf = dd.from_pandas(frame, npartitions=4)
    _refused_like_in_memory(
        lambda: blocksur.fit_dask(ddf, spec, constant=True, method=method, scheduler="synchronous"), expected, "b"
    )


@pytest.mark.parametrize("method", METHODS)
def test_dask_just_inside_the_range_fits(method):
    da = pytest.importorskip("dask.array")
    eqs = _system(1e100)
    ref = blocksur.EquationSystem(eqs).fit(method)
    ys = [da.from_array(y, chunks=SIZES) for y, _ in eqs.values()]
    xs = [da.from_array(x, chunks=(SIZES, -1)) for _, x in eqs.values()]
    fit = blocksur.fit_dask((ys, xs), list(eqs), method=method, scheduler="synchronous")
    for name in eqs:
        # reference: the in-memory fit of the same rows, per equation
        d = record(f"dask vs in-memory fit, y_a x 1e+100, {method}: coef {name} (rel)",
                   rel(fit.coef[name], ref.coef[name]))
        assert d <= 1e-10
