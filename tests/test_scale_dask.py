"""Fits from Dask collections (blocksur.fit_dask) on a distributed LocalCluster with two worker
processes on loopback, started and closed here; and with Dask's local scheduler.

Outside reference: the in-memory fit of the same rows (``EquationSystem.from_table`` /
``EquationSystem``), computed in the test; a fit whose partition summaries were computed in other
processes and merged by a Dask tree must agree with it to relative 1e-10.
"""

from __future__ import annotations

import numpy as np
import pytest

import blocksur
from blocksur.errors import NonFiniteError, UnknownColumnError
from scale_support import arrays, assert_same_fit, wide_frame

dd = pytest.importorskip("dask.dataframe")
da = pytest.importorskip("dask.array")
distributed = pytest.importorskip("distributed")


@pytest.fixture(scope="module")
def client(tmp_path_factory):
    cluster = distributed.LocalCluster(
        n_workers=2,
        processes=True,
        threads_per_worker=1,
        dashboard_address=None,
        host="127.0.0.1",
        local_directory=str(tmp_path_factory.mktemp("dask-workers")),
    )
    c = distributed.Client(cluster)
    try:
        yield c
    finally:
        c.close()
        cluster.close()


def test_cluster_frame_and_arrays_equal_in_memory(client):
    assert len(client.scheduler_info()["workers"]) == 2
    frame, eqs = wide_frame(n_obs=611, seed=21)
    frame.loc[[5, 300], "eq2_x1"] = np.nan
    ref = blocksur.EquationSystem.from_table(frame, eqs, constant=True).fit("ifgls")
    ddf = dd.from_pandas(frame, npartitions=9)
    fit = blocksur.fit_dask(ddf, eqs, constant=True, method="ifgls", split_every=3)
    assert_same_fit(fit, ref, "dask DataFrame on LocalCluster")
    assert fit.stream_info.n_chunks == 9
    assert fit.stream_info.n_rows_dropped == 2
    # the partitions were summarised in the worker processes
    assert sum(client.run(lambda: __import__("sys").modules.get("blocksur._core") is not None).values()) >= 1

    clean, _ = wide_frame(n_obs=611, seed=22)
    ys, xs = arrays(clean, eqs)
    ref2 = blocksur.EquationSystem(list(zip(ys, xs))).fit("fgls", omega="dof")
    dys = [da.from_array(y, chunks=97) for y in ys]
    dxs = [da.from_array(x, chunks=(150, -1)) for x in xs]  # other row chunks: rechunked to the y's
    fit2 = blocksur.fit_dask((dys, dxs), list(eqs), method="fgls", omega="dof")
    assert_same_fit(fit2, ref2, "dask arrays on LocalCluster")
    assert fit2.equation_names == list(eqs)


def test_cluster_errors_name_the_partition(client):
    frame, eqs = wide_frame(n_obs=200, seed=23)
    frame.loc[130, "eq1_x1"] = np.nan
    ddf = dd.from_pandas(frame, npartitions=4)
    with pytest.raises(NonFiniteError, match="partition 2") as err:
        blocksur.fit_dask(ddf, eqs, constant=True, missing="raise")
    assert err.value.equation == "eq1" and err.value.column == "eq1_x1"
    with pytest.raises(UnknownColumnError):
        blocksur.fit_dask(ddf, {"a": ("eq0_y", ["nope"])})


def test_local_scheduler_equals_in_memory():
    frame, eqs = wide_frame(n_obs=300, seed=24)
    ref = blocksur.EquationSystem.from_table(frame, eqs, constant=True).fit("fgls")
    fit = blocksur.fit_dask(dd.from_pandas(frame, npartitions=5), eqs, constant=True, scheduler="threads")
    assert_same_fit(fit, ref, "dask DataFrame, threads")
