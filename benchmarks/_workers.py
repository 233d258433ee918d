"""Subprocess workers for bench_core.py (peak memory and BLAS thread-pool contention).

Run by bench_core.py; each invocation prints exactly one JSON object on its last
stdout line.  Usable by hand too:

    .venv/bin/python benchmarks/_workers.py mem --case d --what bs_fgls
    .venv/bin/python benchmarks/_workers.py threads --case c --config default
"""

from __future__ import annotations

import argparse
import gc
import json
import os
import re
import sys
import time
import warnings

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, HERE)

import numpy as np  # noqa: E402

import cases  # noqa: E402

# numpy_reference (and with it scipy, which bundles a third OpenBLAS) is imported
# only by the memory worker, so the thread worker sees just numpy's and blocksur's pools.


# ---------------------------------------------------------------------------
# memory
# ---------------------------------------------------------------------------

def _status_kb(key: str) -> int:
    with open("/proc/self/status") as f:
        m = re.search(rf"^{key}:\s+(\d+)\s+kB", f.read(), re.M)
    return int(m.group(1)) if m else -1


def _reset_hwm() -> bool:
    """Reset VmHWM to the current RSS (Linux >= 4.0: write 5 to clear_refs)."""
    try:
        with open("/proc/self/clear_refs", "w") as f:
            f.write("5")
        return True
    except OSError:
        return False


def mem_worker(case: str, what: str) -> dict:
    import blocksur  # imported (and its BLAS initialised) before the baseline
    import numpy_reference as ref

    # Warm both BLAS libraries and the extension on a tiny system so that their
    # one-off allocations (thread buffers, etc.) are not charged to the fit.
    small = cases.make_case("a")
    blocksur.EquationSystem(small.as_dict()).fit(method="fgls").se  # noqa: B018
    ref.fgls(small.ys, small.Xs)
    W = small.stacked()
    W.T @ W
    del small, W

    sysd = cases.make_case(case)
    d = sysd.as_dict()
    gc.collect()
    can_reset = _reset_hwm()
    base_rss = _status_kb("VmRSS") * 1024
    base_hwm = _status_kb("VmHWM") * 1024

    stages = []

    def stage(label, fn):
        gc.collect()
        _reset_hwm()
        rss_before = _status_kb("VmRSS") * 1024
        t0 = time.perf_counter()
        out = fn()
        dt = time.perf_counter() - t0
        hwm = _status_kb("VmHWM") * 1024
        rss_after = _status_kb("VmRSS") * 1024
        stages.append({
            "stage": label,
            "seconds": dt,
            "rss_before_inc": rss_before - base_rss,
            "peak_inc": hwm - base_rss,
            "rss_after_inc": rss_after - base_rss,
        })
        return out

    holder = {}
    if what in ("bs_fgls", "bs_fgls_se", "bs_ifgls"):
        s = stage("construct", lambda: blocksur.EquationSystem(d))
        if what == "bs_ifgls":
            def run():
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore")
                    f = s.fit(method="ifgls", tol=0.0, max_iter=3)
                holder["coef"] = f.coef
                return f
            f = stage("fit ifgls(3 iter) + coef", run)
        else:
            def run():
                f = s.fit(method="fgls")
                holder["coef"] = f.coef
                return f
            f = stage("fit fgls + coef", run)
        if what == "bs_fgls_se":
            stage("se", lambda: f.se)
    elif what == "ref_fgls_se":
        stage("numpy reference fgls + se", lambda: ref.fgls(sysd.ys, sysd.Xs, se=True))
    elif what == "floor":
        W = stage("stack W (C order)", lambda: sysd.stacked("C"))
        stage("W.T @ W", lambda: W.T @ W)
    else:
        raise SystemExit(f"unknown --what {what}")

    peak = max(st["peak_inc"] for st in stages)
    return {
        "case": case,
        "what": what,
        "can_reset_hwm": can_reset,
        "base_rss": base_rss,
        "base_hwm": base_hwm,
        "input_bytes": sysd.input_bytes,
        "P": sysd.P,
        "K": sysd.K,
        "peak_inc": peak,
        "stages": stages,
    }


# ---------------------------------------------------------------------------
# BLAS thread pools: alternating numpy and blocksur calls
# ---------------------------------------------------------------------------

def _libs_summary(info):
    return [{k: lib.get(k) for k in ("prefix", "filepath", "version", "num_threads",
                                      "threading_layer", "architecture", "internal_api")}
            for lib in info]


def threads_worker(case: str, config: str, loops: int, rounds: int, pause: float) -> dict:
    from contextlib import nullcontext

    from threadpoolctl import threadpool_info, threadpool_limits

    import blocksur

    info_before = _libs_summary(threadpool_info())
    sysd = cases.make_case(case)
    d = sysd.as_dict()
    W = sysd.stacked("F")

    if config in ("default", "env1"):
        ctx = nullcontext()
    elif config == "tpl1":
        ctx = threadpool_limits(limits=1)
    elif config == "tpl_np1":
        ctx = threadpool_limits(limits={"libscipy_openblas": 1})
    elif config == "tpl_bs1":
        ctx = threadpool_limits(limits={"libopenblas": 1})
    else:
        raise SystemExit(f"unknown --config {config}")

    def np_op():
        return W.T @ W

    def bs_op():
        return blocksur.EquationSystem(d, copy=False).fit(method="fgls").coef

    res = {"np_alone": [], "bs_alone": [], "alt_total": [], "alt_np": [], "alt_bs": []}
    with ctx:
        info_inside = _libs_summary(threadpool_info())
        np_op()
        bs_op()
        for _ in range(rounds):
            gc.collect()
            time.sleep(pause)
            np_op()
            for _ in range(loops):
                t0 = time.perf_counter()
                np_op()
                res["np_alone"].append(time.perf_counter() - t0)
            time.sleep(pause)
            bs_op()
            for _ in range(loops):
                t0 = time.perf_counter()
                bs_op()
                res["bs_alone"].append(time.perf_counter() - t0)
            time.sleep(pause)
            for _ in range(loops):
                t0 = time.perf_counter()
                np_op()
                t1 = time.perf_counter()
                bs_op()
                t2 = time.perf_counter()
                res["alt_np"].append(t1 - t0)
                res["alt_bs"].append(t2 - t1)
                res["alt_total"].append(t2 - t0)
    med = {k: float(np.median(v)) for k, v in res.items()}
    return {
        "case": case,
        "config": config,
        "env": {k: v for k, v in os.environ.items()
                if k.startswith(("OPENBLAS", "OMP_", "GOTO", "MKL_"))},
        "threadpool_info_before": info_before,
        "threadpool_info_inside": info_inside,
        "median": med,
        "n_samples": len(res["alt_total"]),
        "loadavg": os.getloadavg(),
    }


def main(argv=None):
    p = argparse.ArgumentParser()
    sub = p.add_subparsers(dest="cmd", required=True)
    m = sub.add_parser("mem")
    m.add_argument("--case", default="d")
    m.add_argument("--what", default="bs_fgls")
    t = sub.add_parser("threads")
    t.add_argument("--case", default="c")
    t.add_argument("--config", default="default")
    t.add_argument("--loops", type=int, default=20)
    t.add_argument("--rounds", type=int, default=3)
    t.add_argument("--pause", type=float, default=0.3)
    a = p.parse_args(argv)
    if a.cmd == "mem":
        out = mem_worker(a.case, a.what)
    else:
        out = threads_worker(a.case, a.config, a.loops, a.rounds, a.pause)
    sys.stdout.flush()
    print(json.dumps(out))


if __name__ == "__main__":
    main()
