"""Fits over chunks and Parquet files (blocksur.fit_chunks, blocksur.fit_parquet).

Outside reference: the in-memory fit of the same rows (``EquationSystem.from_table`` /
``EquationSystem``), computed in the test; the streamed two-pass computation must agree with it
to relative 1e-10 for any chunking (one chunk, chunks of one row, uneven chunks), for tables,
record batches and arrays. Error cases check the typed error and what it names.
"""

from __future__ import annotations

import pickle

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.parquet as pq
import pytest

import blocksur
from blocksur.errors import (
    DataNotKeptError,
    FormulaError,
    InputError,
    InvalidOptionError,
    NonFiniteError,
    UnknownColumnError,
)
from scale_support import arrays, assert_same_fit, rel, wide_frame
from reference import record


def _split(n: int, sizes) -> list[tuple[int, int]]:
    b = np.concatenate([[0], np.cumsum(sizes)])
    assert b[-1] == n
    return list(zip(b[:-1], b[1:]))


def _uneven(n: int, seed: int) -> list[int]:
    rng = np.random.default_rng(seed)
    sizes = []
    while sum(sizes) < n:
        sizes.append(int(min(rng.integers(1, 40), n - sum(sizes))))
    return sizes


CHUNKINGS = {
    "one chunk": lambda n: [n],
    "rows of one": lambda n: [1] * n,
    "uneven": lambda n: _uneven(n, 3),
    "two halves": lambda n: [n // 2, n - n // 2],
}


@pytest.mark.parametrize("chunking", list(CHUNKINGS))
@pytest.mark.parametrize("method,omega", [("fgls", "ml"), ("ifgls", "ml"), ("ols", "dof"), ("ifgls", "dof")])
def test_table_chunks_equal_in_memory(chunking, method, omega):
    frame, eqs = wide_frame()
    ref = blocksur.EquationSystem.from_table(frame, eqs, constant=True).fit(method, omega=omega)
    parts = [frame.iloc[a:b] for a, b in _split(len(frame), CHUNKINGS[chunking](len(frame)))]
    fit = blocksur.fit_chunks(parts, eqs, constant=True, method=method, omega=omega)
    assert_same_fit(fit, ref, f"chunks ({chunking})")
    assert fit.stream_info.n_chunks == len(parts)
    assert fit.stream_info.n_rows == len(frame)


def test_callable_of_record_batches_and_restrictions():
    frame, eqs = wide_frame(seed=8)
    table = pa.Table.from_pandas(frame, preserve_index=False)
    restr = "eq0::eq0_x1 = eq1::eq1_x1"
    ref = blocksur.EquationSystem.from_table(frame, eqs, constant=True).fit(
        "ifgls", restrictions=restr, inference="t")

    def batches():  # a fresh iterator each call
        return iter(table.to_batches(max_chunksize=23))

    fit = blocksur.fit_chunks(batches, eqs, constant=True, method="ifgls", restrictions=restr, inference="t")
    assert_same_fit(fit, ref, "record batches, restricted")
    assert fit.n_restrictions == 1
    c = fit.coef
    np.testing.assert_allclose(c[("eq0", "eq0_x1")], c[("eq1", "eq1_x1")], rtol=1e-12, atol=0)


def test_array_chunks_equal_in_memory():
    frame, eqs = wide_frame(seed=9)
    ys, xs = arrays(frame, eqs)
    ref = blocksur.EquationSystem(list(zip(ys, xs))).fit("ifgls")
    parts = [([y[a:b] for y in ys], [x[a:b] for x in xs]) for a, b in _split(len(frame), _uneven(len(frame), 4))]
    fit = blocksur.fit_chunks(parts, method="ifgls")
    assert_same_fit(fit, ref, "array chunks")
    # one (t, N) array of dependent variables per chunk, names given
    parts2 = [(np.column_stack([y[a:b] for y in ys]), [x[a:b] for x in xs]) for a, b in _split(len(frame), [100, 57])]
    fit2 = blocksur.fit_chunks(parts2, list(eqs), method="ifgls")
    assert fit2.equation_names == list(eqs)
    np.testing.assert_allclose(fit2.coef.to_numpy(), ref.coef.to_numpy(), rtol=1e-10, atol=0)


def test_missing_rows_dropped_as_from_table():
    frame, eqs = wide_frame(seed=10)
    frame.loc[[3, 50, 51], "eq1_x1"] = np.nan
    frame.loc[90, "eq2_y"] = np.inf
    ref_system = blocksur.EquationSystem.from_table(frame, eqs, constant=True)
    ref = ref_system.fit("fgls")
    parts = [frame.iloc[a:b] for a, b in _split(len(frame), _uneven(len(frame), 5))]
    fit = blocksur.fit_chunks(parts, eqs, constant=True)
    assert_same_fit(fit, ref, "chunks with missing rows")
    assert fit.stream_info.n_rows_dropped == ref_system.sample_info.n_dropped == 4
    assert fit.stream_info.n_rows_read == len(frame)


def test_missing_raise_names_the_row_over_all_chunks():
    frame, eqs = wide_frame(seed=11)
    frame.loc[77, "eq1_x1"] = np.nan
    parts = [frame.iloc[a:b] for a, b in _split(len(frame), [30, 30, 97])]
    with pytest.raises(NonFiniteError) as err:
        blocksur.fit_chunks(parts, eqs, constant=True, missing="raise")
    assert err.value.row == 77
    assert err.value.equation == "eq1"
    assert err.value.column == "eq1_x1"


@pytest.mark.parametrize("layout", ["one file", "directory"])
def test_parquet_equals_in_memory(tmp_path, layout):
    frame, eqs = wide_frame(n_obs=403, seed=12)
    frame.loc[[10, 200], "eq3_x2"] = np.nan
    table = pa.Table.from_pandas(frame, preserve_index=False)
    if layout == "one file":
        pq.write_table(table, tmp_path / "rows.parquet", row_group_size=64)
        source = tmp_path / "rows.parquet"
    else:
        pq.write_table(table.slice(0, 150), tmp_path / "part-0.parquet", row_group_size=50)
        pq.write_table(table.slice(150), tmp_path / "part-1.parquet", row_group_size=100)
        source = tmp_path
    ref = blocksur.EquationSystem.from_table(frame, eqs, constant=True).fit("ifgls", omega="dof")
    fit = blocksur.fit_parquet(source, eqs, constant=True, batch_size=37, method="ifgls", omega="dof")
    assert_same_fit(fit, ref, f"parquet ({layout})")
    assert fit.stream_info.source == "parquet"
    assert fit.stream_info.n_rows_dropped == 2


def test_rowless_fit_what_works_and_what_says_why():
    frame, eqs = wide_frame(seed=13)
    system = blocksur.EquationSystem.from_table(frame, eqs, constant=True)
    ref = system.fit("ifgls")
    fit = blocksur.fit_chunks([frame.iloc[:80], frame.iloc[80:]], eqs, constant=True, method="ifgls")
    # computed from the summaries: tests, predictions, reports
    w_ref, w = ref.wald("eq0::eq0_x1 = 0"), fit.wald("eq0::eq0_x1 = 0")
    assert abs(w.statistic - w_ref.statistic) <= 1e-9 * w_ref.statistic
    new = {n: frame[r].iloc[:5].assign(Intercept=1.0)[["Intercept", *r]] for n, (_, r) in eqs.items()}
    np.testing.assert_allclose(fit.predict(new), ref.predict(new), rtol=1e-10, atol=1e-12)
    np.testing.assert_allclose(fit.prediction_se(new), ref.prediction_se(new), rtol=1e-9, atol=0)
    assert abs(fit.omega_diagonal_lm().statistic - ref.omega_diagonal_lm().statistic) <= 1e-9 * ref.omega_diagonal_lm().statistic
    assert "McElroy" in fit.report()
    # re-estimation from the same summaries (reference: the in-memory fit with the same options)
    ols = fit.refit("ols")
    assert_same_fit(ols, system.fit("ols"), "refit")
    lr = fit.refit("ifgls", restrictions="eq0::eq0_x1 = 0").lr_against(fit)
    lr_ref = system.fit("ifgls", restrictions="eq0::eq0_x1 = 0").lr_against(ref)
    assert abs(lr.statistic - lr_ref.statistic) <= 1e-8 * max(lr_ref.statistic, 1.0)
    # row-level results: a typed error saying why
    for what in (lambda: fit.resid, lambda: fit.fitted, lambda: fit.to_dict(), lambda: pickle.dumps(fit)):
        with pytest.raises(DataNotKeptError, match="keeps no rows"):
            what()


def test_rows_are_read_once_so_generators_work():
    # One read of the rows: a generator (readable once) and a chunk function called once give
    # the in-memory fit (statsmodels-checked elsewhere) to rounding.
    frame, eqs = wide_frame(seed=14)
    ref = blocksur.EquationSystem.from_table(frame, eqs, constant=True).fit("ifgls")
    calls = []

    def once():
        calls.append(1)
        return iter([frame.iloc[:70], frame.iloc[70:]])

    for chunks in ((frame.iloc[i:i + 33] for i in range(0, len(frame), 33)), once):
        fit = blocksur.fit_chunks(chunks, eqs, constant=True, method="ifgls")
        assert rel(fit.coef, ref.coef) < 1e-10 and rel(fit.se, ref.se) < 1e-10
    assert calls == [1]


def test_input_errors_are_typed_and_say_what_to_fix():
    frame, eqs = wide_frame(seed=15)
    parts = [frame.iloc[:80], frame.iloc[80:]]
    with pytest.raises(InputError, match="chunks must be a list"):
        blocksur.fit_chunks(5, eqs, constant=True)
    with pytest.raises(InvalidOptionError, match="ledoit-wolf.*not available"):
        blocksur.fit_chunks(parts, eqs, omega="ledoit-wolf")
    with pytest.raises(UnknownColumnError) as err:
        blocksur.fit_chunks(parts, {"a": ("eq0_y", ["eq0_x11"])})
    assert err.value.suggestions and "eq0_x1" in err.value.suggestions
    missing_later = [frame.iloc[:80], frame.iloc[80:].drop(columns="eq2_x1")]
    with pytest.raises(UnknownColumnError, match="chunk 1"):
        blocksur.fit_chunks(missing_later, eqs)
    with pytest.raises(FormulaError, match="column"):
        blocksur.fit_chunks(parts, {"a": "eq0_y ~ eq0_x1"})
    with pytest.raises(InputError, match="chunks as a list"):
        blocksur.fit_chunks(frame, eqs)
    with pytest.raises(InvalidOptionError, match="missing"):
        blocksur.fit_chunks(parts, eqs, missing="skip")
    with pytest.raises(InvalidOptionError, match="batch_size"):
        blocksur.fit_parquet("x.parquet", eqs, batch_size=0)
    with pytest.raises(InputError, match="no such Parquet"):
        blocksur.fit_parquet("/nonexistent/rows.parquet", eqs)


def test_progress_bars_switchable(capsys):
    frame, eqs = wide_frame(seed=16)
    parts = [frame.iloc[:80], frame.iloc[80:]]
    blocksur.fit_chunks(parts, eqs, constant=True)  # default: off when stderr is not a terminal
    assert "one pass over the rows" not in capsys.readouterr().err
    fit = blocksur.fit_chunks(parts, eqs, constant=True, method="ifgls", progress=True)
    err = capsys.readouterr().err
    assert "one pass over the rows" in err
    assert fit.converged
    with pytest.raises(InvalidOptionError, match="progress"):
        blocksur.fit_chunks(parts, eqs, progress="yes")


def test_large_mean_keeps_its_digits():
    # y with a mean 1e6 times its noise: the summaries keep the sums of squares about the mean
    frame, eqs = wide_frame(seed=17)
    frame["eq0_y"] = frame["eq0_y"] + 1e6
    parts = [frame.iloc[a:b] for a, b in _split(len(frame), _uneven(len(frame), 6))]
    fit = blocksur.fit_chunks(parts, eqs, constant=True, method="ols")
    # reference: numpy least squares on centred data (the textbook way to avoid cancellation)
    y = frame["eq0_y"].to_numpy()
    xc = frame[eqs["eq0"][1]].to_numpy()
    xc = xc - xc.mean(axis=0)
    yc = y - y.mean()
    e = yc - xc @ np.linalg.lstsq(xc, yc, rcond=None)[0]
    # backward-stable QR of [X | y] perturbs y by about eps ||y||, so SSR carries a relative
    # error near 2 eps ||y|| / ||e|| = 1.6e-10 here; allow a few times that
    d = record("chunks vs centred numpy OLS: ssr with mean 1e6 (rel)", abs(fit.ssr.iloc[0] / (e @ e) - 1))
    assert d <= 1e-9
    d = record("chunks vs centred numpy OLS: r2 with mean 1e6 (rel)", abs(fit.r2.iloc[0] / (1 - (e @ e) / (yc @ yc)) - 1))
    assert d <= 1e-9
    ref = blocksur.EquationSystem.from_table(frame, eqs, constant=True).fit("ols")
    assert rel(fit.coef, ref.coef) <= 1e-10  # reference: the in-memory fit


def test_public_names_documented_and_examples_run():
    import doctest
    import inspect

    from blocksur import _dask, _many, _stream

    for module in (_stream, _dask, _many):
        assert module.__doc__ and "Example" in module.__doc__
        for name in module.__all__:
            assert inspect.getdoc(getattr(module, name)), f"{module.__name__}.{name}"
            assert name in blocksur.__all__
        # reference: the standard library's doctest runner on the module's examples
        assert doctest.testmod(module, optionflags=doctest.ELLIPSIS).failed == 0
