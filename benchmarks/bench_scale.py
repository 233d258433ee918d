"""Scale benchmarks for blocksur: many equations, long samples (in memory and streamed from
Parquet), a Dask cluster, and many small systems at once.

    .venv/bin/python benchmarks/bench_scale.py            # full run (about an hour on 2 cores)
    .venv/bin/python benchmarks/bench_scale.py --quick    # smoke test, small sizes (a few minutes)

Every measured point runs in a fresh subprocess (this file with ``--worker``), which generates its
seeded data, resets the kernel's peak-RSS counter (VmHWM) once the data are loaded, runs the
computation ``repeats`` times and reports the median wall time, the peak RSS of the process and
its growth over the RSS with the data loaded. Ratios are between medians measured in the same
run. See benchmarks/README.md ("Scale benchmarks") for what each column means.
"""

from __future__ import annotations

import argparse
import datetime as _dt
import gc
import json
import os
import platform
import shutil
import subprocess
import sys
import tempfile
import time
import warnings

import numpy as np

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, HERE)

from _workers import _reset_hwm, _status_kb  # noqa: E402  (VmHWM reset and /proc/self/status)

GB = 1e9
SEED = 2026
BLOCK = 262_144  # rows per generated block (and per Parquet row group)


# =============================================================================================
# seeded data, identical whether generated at once, block by block, or written to Parquet
# =============================================================================================
def _params(n, k, seed):
    rng = np.random.default_rng([seed, 1])
    beta = rng.normal(size=(n, k))
    load = rng.normal(0, 0.6, size=(n, 3))
    scale = 0.5 + rng.random(n)
    return beta, load, scale


def make_block(n, k, rows, block, seed=SEED):
    """Rows of block ``block``: x (rows, n, k-1) without the constant, y (rows, n)."""
    beta, load, scale = _params(n, k, seed)
    rng = np.random.default_rng([seed, 2, block])
    x = rng.standard_normal((rows, n, k - 1))
    f = rng.standard_normal((rows, 3))
    e = f @ load.T + rng.standard_normal((rows, n)) * scale
    y = beta[:, 0] + np.einsum("rnk,nk->rn", x, beta[:, 1:]) + e
    return x, y


def block_sizes(t):
    return [min(BLOCK, t - a) for a in range(0, t, BLOCK)]


def make_system(n, t, k, seed=SEED):
    """(ys, Xs) in memory: X_i = [1, x_i] in Fortran order, T x k."""
    ys = [np.empty(t) for _ in range(n)]
    Xs = [np.empty((t, k), order="F") for _ in range(n)]
    for X in Xs:
        X[:, 0] = 1.0
    a = 0
    for b, rows in enumerate(block_sizes(t)):
        x, y = make_block(n, k, rows, b, seed)
        for i in range(n):
            ys[i][a:a + rows] = y[:, i]
            Xs[i][a:a + rows, 1:] = x[:, i, :]
        a += rows
        del x, y
    return ys, Xs


def columns(n, k):
    ys = [f"y{i}" for i in range(n)]
    xs = [[f"x{i}_{j}" for j in range(1, k)] for i in range(n)]
    return ys, xs


def equations(n, k):
    ys, xs = columns(n, k)
    return {f"eq{i}": (ys[i], xs[i]) for i in range(n)}


def write_parquet(path, n, t, k, seed=SEED):
    """Writes the rows block by block (row groups of BLOCK rows); never holds more than a block."""
    import pyarrow as pa
    import pyarrow.parquet as pq

    yc, xc = columns(n, k)
    names = [c for i in range(n) for c in [yc[i], *xc[i]]]
    schema = pa.schema([(c, pa.float64()) for c in names])
    with pq.ParquetWriter(path, schema, compression="snappy") as w:
        for b, rows in enumerate(block_sizes(t)):
            x, y = make_block(n, k, rows, b, seed)
            arrays = []
            for i in range(n):
                arrays.append(pa.array(y[:, i]))
                arrays.extend(pa.array(np.ascontiguousarray(x[:, i, j])) for j in range(k - 1))
            w.write_table(pa.Table.from_arrays(arrays, schema=schema), row_group_size=BLOCK)
            del x, y, arrays


# =============================================================================================
# the numpy reference (benchmarks/numpy_reference.py), with a Ledoit-Wolf Omega
# =============================================================================================
def lw_diagonal(e):
    """Ledoit-Wolf shrinkage of S = E'E/T towards its diagonal, in numpy."""
    t, n = e.shape
    s = e.T @ e / t
    e2 = e * e
    pi = e2.T @ e2 / t - s * s  # mean_t (e_ti e_tj - s_ij)^2
    off = ~np.eye(n, dtype=bool)
    lam = float(np.clip(pi[off].sum() / (t * np.sum(s[off] ** 2)), 0.0, 1.0))
    return (1 - lam) * s + lam * np.diag(np.diag(s)), lam


def ref_fgls(ys, Xs, omega):
    """numpy reference two-step FGLS with standard errors (omega 'ml' or 'ledoit-wolf')."""
    import numpy_reference as ref

    if omega == "ml":
        f = ref.fgls(ys, Xs, se=True)
        return np.concatenate(f.coef), np.concatenate(f.se)
    m = ref.Moments(ys, Xs)
    b0 = m.to_beta(m.ols_gamma())
    e = np.column_stack([y - X @ b for y, X, b in zip(ys, Xs, b0)])
    om, _ = lw_diagonal(e)
    g, cf = m.gls(om)
    return np.concatenate(m.to_beta(g)), np.concatenate(m.se_from_chol(cf))


def floor_product(W):
    """W'W. Beyond 16,384 columns in blocks of 4,096 (the upper block triangle, by gemm: the
    flops of one syrk): numpy 2.4's bundled OpenBLAS crashes (SIGSEGV) in its multi-threaded
    syrk for W.T @ W at about 24,000 columns and 500 or more rows."""
    p = W.shape[1]
    if p <= 16_384:
        return W.T @ W
    G = np.empty((p, p))
    bs = 4096
    for i in range(0, p, bs):
        wi = W[:, i:i + bs]
        for j in range(i, p, bs):
            G[i:i + bs, j:j + bs] = wi.T @ W[:, j:j + bs]
    return G


# =============================================================================================
# the worker: one measurement in a fresh process
# =============================================================================================
def _status(key):
    return _status_kb(key) * 1024


def _warm_up():
    import blocksur

    ys, Xs = make_system(3, 50, 3, seed=1)
    blocksur.EquationSystem(list(zip(ys, Xs))).fit("fgls", omega="ledoit-wolf").se  # noqa: B018
    ref_fgls(ys, Xs, "ml")
    _ = np.ones((50, 5)).T @ np.ones((50, 5))


def worker(spec):
    import blocksur

    kind = spec["kind"]
    n, t, k = spec.get("n"), spec.get("t"), spec.get("k")
    repeats = int(spec.get("repeats", 1))
    _warm_up()
    out = {"spec": spec}
    data = None
    if kind in ("bs", "ref", "floor", "inmem_from_parquet"):
        if kind == "inmem_from_parquet":
            t0 = time.perf_counter()
            import pyarrow.parquet as pq

            yc, xc = columns(n, k)
            pf = pq.ParquetFile(spec["path"])
            ys = [np.empty(pf.metadata.num_rows) for _ in range(n)]
            Xs = [np.empty((pf.metadata.num_rows, k), order="F") for _ in range(n)]
            a = 0
            for batch in pf.iter_batches(batch_size=BLOCK):
                rows = batch.num_rows
                for i in range(n):
                    ys[i][a:a + rows] = batch.column(yc[i]).to_numpy()
                    Xs[i][a:a + rows, 0] = 1.0
                    for j, c in enumerate(xc[i]):
                        Xs[i][a:a + rows, j + 1] = batch.column(c).to_numpy()
                a += rows
            out["read_seconds"] = time.perf_counter() - t0
        else:
            ys, Xs = make_system(n, t, k)
        data = (ys, Xs)
        out["input_bytes"] = int(sum(y.nbytes + X.nbytes for y, X in zip(ys, Xs)))
    gc.collect()
    base = _status("VmRSS")
    out["can_reset_hwm"] = _reset_hwm()
    result = {}

    def once():
        """One computation; returns (kept results, seconds, cpu seconds)."""
        c0 = time.process_time()
        t0 = time.perf_counter()
        if kind in ("bs", "inmem_from_parquet"):
            ys, Xs = data
            system = blocksur.EquationSystem(list(zip(ys, Xs)))
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                fit = system.fit("fgls", omega=spec.get("omega", "ml"), solver=spec.get("solver", "auto"))
                coef = fit.coef.to_numpy()
                result.setdefault("coef_seconds", []).append(time.perf_counter() - t0)
                if fit.solver == "direct":
                    se = fit.se.to_numpy()
                    result["se_of"] = "all"
                elif spec.get("cg_se", False):
                    se = fit.se_of(["eq0"]).to_numpy()  # per-coefficient CG solves: a sample
                    result["se_of"] = "eq0"
                else:
                    se = np.zeros(0)
                    result["se_of"] = "none"
            result.update(solver=fit.solver, cg_iterations=list(fit.cg_iterations), shrinkage=fit.shrinkage)
            keep = (coef, se, fit.omega.to_numpy(), fit.loglik)
            del system, fit
        elif kind == "ref":
            ys, Xs = data
            keep = ref_fgls(ys, Xs, spec.get("omega", "ml"))
        elif kind == "floor":
            ys, Xs = data
            W = np.asfortranarray(np.column_stack([*Xs, *ys]))
            t0 = time.perf_counter()  # the floor is the product alone (stacking is not timed)
            c0 = time.process_time()
            G = floor_product(W)
            keep = None
            del W, G
        elif kind == "stream":
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                fit = blocksur.fit_parquet(spec["path"], equations(n, k), constant=True,
                                           batch_size=spec.get("batch_size", 65_536), progress=False)
                keep = (fit.coef.to_numpy(), fit.se.to_numpy(), fit.omega.to_numpy(), fit.loglik)
            result["stream_seconds"] = list(fit.stream_info.seconds)
            del fit
        elif kind == "dask":
            keep = _dask_fit(spec)
        elif kind in ("many_batch", "many_loop"):
            keep = _many(spec, kind)
        else:
            raise SystemExit(f"unknown kind {kind}")
        secs = spec.pop("_seconds", time.perf_counter() - t0)  # kinds that time only their fit
        return keep, secs, spec.pop("_cpu", time.process_time() - c0)

    times, cpu = [], []
    inner = 1
    for r in range(repeats):
        gc.collect()
        tot = ctot = 0.0
        for _ in range(inner):
            keep, secs, csecs = once()
            tot += secs
            ctot += csecs
        if r == 0 and tot < 0.02 and kind in ("bs", "ref", "floor"):
            inner = int(np.ceil(0.02 / max(tot, 1e-6)))  # short calls: loop them to >= 20 ms per sample
            continue  # the first sample was a warm-up
        times.append(tot / inner)
        cpu.append(ctot / inner)
    out["inner_loops"] = inner
    out.update(result)
    out["failed_systems"] = spec.pop("_failed", None)
    out["seconds"] = times
    out["median"] = float(np.median(times))
    out["cpu_over_wall"] = float(np.median(np.array(cpu) / np.array(times)))
    out["base_rss"] = base
    out["peak"] = _status("VmHWM")
    out["growth"] = out["peak"] - base
    if keep is not None and spec.get("save"):
        coef, se, om, ll = keep if len(keep) == 4 else (*keep, None, None)
        np.savez(spec["save"], coef=coef, se=se, omega=om if om is not None else np.zeros(0),
                 loglik=np.array([np.nan if ll is None else ll]))
    return out


def _dask_fit(spec):
    import blocksur
    import dask.dataframe as dd
    import distributed

    with distributed.LocalCluster(n_workers=2, processes=True, threads_per_worker=1, dashboard_address=None,
                                  host="127.0.0.1") as cluster, distributed.Client(cluster):
        c0, t0 = time.process_time(), time.perf_counter()  # the fit, not the cluster start
        frame = dd.read_parquet(spec["path"], split_row_groups=True)
        fit = blocksur.fit_dask(frame, equations(spec["n"], spec["k"]), constant=True)
        spec["_seconds"] = time.perf_counter() - t0
        spec["_cpu"] = time.process_time() - c0
        return fit.coef.to_numpy(), fit.se.to_numpy(), fit.omega.to_numpy(), fit.loglik


def _many(spec, kind):
    import blocksur

    g, n, t, k = spec["g"], spec["n"], spec["t"], spec["k"]
    rng = np.random.default_rng([SEED, 3])
    y = rng.standard_normal((g, t, n))
    xs = [np.concatenate([np.ones((g, t, 1)), rng.standard_normal((g, t, k - 1))], axis=2) for _ in range(n)]
    y += np.stack([x.sum(axis=2) for x in xs], axis=2)
    c0, t0 = time.process_time(), time.perf_counter()
    if kind == "many_batch":
        many = blocksur.fit_stacked(y, xs, method="fgls")
        coef, se = many.coef.to_numpy(), many.se.to_numpy()
        spec["_failed"] = many.n_failed
    else:
        m = spec.get("loop_systems", g)
        coef = np.empty((m, n * k))
        se = np.empty((m, n * k))
        for s in range(m):
            fit = blocksur.EquationSystem([(y[s, :, i], xs[i][s]) for i in range(n)]).fit("fgls")
            coef[s] = fit.coef.to_numpy()
            se[s] = fit.se.to_numpy()
    spec["_seconds"] = time.perf_counter() - t0
    spec["_cpu"] = time.process_time() - c0
    return coef, se


# =============================================================================================
# the driver
# =============================================================================================
def run_worker(spec, log, timeout=3600):
    cmd = [sys.executable, os.path.abspath(__file__), "--worker", json.dumps(spec)]
    t0 = time.perf_counter()
    try:
        p = subprocess.run(cmd, capture_output=True, text=True, timeout=timeout)
    except subprocess.TimeoutExpired:
        log(f"  TIMEOUT after {timeout} s: {spec}")
        return {"spec": spec, "error": f"timeout {timeout} s"}
    if p.returncode != 0:
        tail = (p.stderr or "").strip().splitlines()[-3:]
        log(f"  FAILED ({p.returncode}): {spec['kind']} {spec.get('n')}/{spec.get('t')}: {' | '.join(tail)}")
        return {"spec": spec, "error": " | ".join(tail)}
    res = json.loads(p.stdout.strip().splitlines()[-1])
    res["wall_with_startup"] = time.perf_counter() - t0
    return res


def fmt_t(s):
    if s is None or not np.isfinite(s):
        return "-"
    if s < 1e-3:
        return f"{s * 1e6:.0f} us"
    if s < 1:
        return f"{s * 1e3:.1f} ms"
    return f"{s:.2f} s"


def fmt_b(b):
    if b is None:
        return "-"
    return f"{b / GB:.2f} GB" if b >= 0.1 * GB else f"{b / 1e6:.0f} MB"


def table(headers, rows):
    out = ["| " + " | ".join(headers) + " |", "|" + "|".join("---" for _ in headers) + "|"]
    out += ["| " + " | ".join(str(c) for c in r) + " |" for r in rows]
    return "\n".join(out)


def rel(a, b):
    a, b = np.asarray(a, float), np.asarray(b, float)
    return float(np.max(np.abs(a - b)) / max(np.max(np.abs(b)), 1e-300))


def compare_saved(a, b):
    """Normwise relative differences of the results two workers saved (what both have)."""
    if not (os.path.exists(a) and os.path.exists(b)):
        return {}
    x, y = np.load(a), np.load(b)
    return {key: rel(x[key], y[key]) for key in ("coef", "se", "omega", "loglik")
            if x[key].size and y[key].size and np.isfinite(x[key]).all() and np.isfinite(y[key]).all()}


def worst_rel(d):
    return f"{max(d.values()):.1e}" if d else "-"


def _available_memory():
    try:
        import psutil

        return psutil.virtual_memory().available
    except ImportError:  # pragma: no cover
        return 0


def ref_memory(n, t, k):
    """Bytes the numpy reference needs about: Z (T x P), G (P x P), M and its factor (K x K)."""
    kk, p = n * k, n * k + n
    return 8 * (t * p + p * p + 2 * kk * kk)


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--quick", action="store_true", help="small sizes, few repeats (smoke test)")
    ap.add_argument("--only", default=None,
                    help="comma-separated sections: n (curve vs N), t (curve vs T), targets")
    ap.add_argument("--targets", default="1,2,3,4,5",
                    help="with the targets section: which of the five targets to run (comma-separated numbers)")
    ap.add_argument("--out", default=os.path.join(HERE, "out"))
    ap.add_argument("--data-dir", default=None, help="where to write the Parquet files (default: a temp dir)")
    ap.add_argument("--keep-data", action="store_true", help="keep the Parquet files")
    ap.add_argument("--wait-idle", type=float, default=0.0, metavar="SECONDS",
                    help="before each section, wait up to SECONDS for the 1-min load average to drop below 1")
    ap.add_argument("--replot", default=None, metavar="JSON",
                    help="redraw the plots from a scale-<stamp>.json of an earlier run, and stop")
    ap.add_argument("--worker", default=None, help=argparse.SUPPRESS)
    a = ap.parse_args(argv)
    if a.worker:
        print(json.dumps(worker(json.loads(a.worker)), default=float))
        return 0
    if a.replot:
        with open(a.replot) as f:
            old = json.load(f)
        sfx = "-quick" if "quick" in os.path.basename(a.replot) else ""
        if "curve_n" in old:
            p0 = old["curve_n"][0]["bs"]["spec"]
            _plot_curve(old["curve_n"], "n", os.path.join(a.out, f"scale-n{sfx}.png"), f"T={p0['t']}, K_i={p0['k']}")
        if "curve_t" in old:
            p0 = old["curve_t"][0]["stream"]["spec"]
            _plot_curve(old["curve_t"], "t", os.path.join(a.out, f"scale-t{sfx}.png"), f"N={p0['n']}, K_i={p0['k']}")
        return 0

    sections = set((a.only or "n,t,targets").split(","))
    tsel = set(a.targets.split(","))
    q = a.quick
    os.makedirs(a.out, exist_ok=True)
    stamp = _dt.datetime.now().strftime("%Y%m%d-%H%M%S")
    data_dir = a.data_dir or tempfile.mkdtemp(prefix="blocksur-scale-")
    os.makedirs(data_dir, exist_ok=True)
    lines = []

    def log(msg=""):
        print(msg, flush=True)
        lines.append(msg)

    def wait_idle():
        if a.wait_idle <= 0:
            return
        end = time.time() + a.wait_idle
        while os.getloadavg()[0] >= 1.0 and time.time() < end:
            time.sleep(10)
        log(f"(1-min load average {os.getloadavg()[0]:.2f})")

    import blocksur

    meta = {
        "command": " ".join([".venv/bin/python", "benchmarks/bench_scale.py", *sys.argv[1:]]),
        "date": _dt.datetime.now().isoformat(timespec="seconds"),
        "cpus": os.cpu_count(),
        "python": platform.python_version(),
        "numpy": np.__version__,
        "blocksur": blocksur.__version__,
        "loadavg_start": [round(x, 2) for x in os.getloadavg()],
    }
    log(f"bench_scale: {meta['command']}  ({meta['date']}, {meta['cpus']} cpus, load {meta['loadavg_start']})")
    results = {"meta": meta}
    report = [f"# blocksur scale benchmarks ({'quick' if q else 'full'} run)", "",
              f"`{meta['command']}` — {meta['date']}, {meta['cpus']} cpus, Python {meta['python']}, "
              f"numpy {meta['numpy']}, blocksur {meta['blocksur']}; 1-min load average at start "
              f"{meta['loadavg_start'][0]}.", ""]
    targets = []

    # ---- curve against N ------------------------------------------------------------------
    if "n" in sections:
        wait_idle()
        t_n, k_n = (300, 4) if q else (1000, 4)
        ns = [10, 30, 100, 300] if q else [10, 30, 100, 300, 1000, 2000, 5000]
        log(f"\n== time and peak memory against N (T={t_n}, K_i={k_n}, two-step FGLS with standard errors, "
            "Ledoit-Wolf Omega with diagonal target)")
        rows, pts = [], []
        for n in ns:
            reps = 5 if n <= 300 else (3 if n <= 1000 else 1)
            if q:
                reps = 3
            sv_bs = os.path.join(data_dir, f"n{n}-bs.npz")
            sv_rf = os.path.join(data_dir, f"n{n}-ref.npz")
            bs = run_worker({"kind": "bs", "n": n, "t": t_n, "k": k_n, "omega": "ledoit-wolf",
                             "repeats": reps, "save": sv_bs}, log)
            fl = run_worker({"kind": "floor", "n": n, "t": t_n, "k": k_n, "repeats": reps}, log)
            need = ref_memory(n, t_n, k_n)
            if need < 6 * GB:
                rf = run_worker({"kind": "ref", "n": n, "t": t_n, "k": k_n, "omega": "ledoit-wolf",
                                 "repeats": max(1, reps // 2 + 1) if n > 300 else reps, "save": sv_rf}, log)
            else:
                rf = {"error": f"skipped: needs about {need / GB:.0f} GB"}
            agree = compare_saved(sv_bs, sv_rf) if "error" not in bs and "error" not in rf and \
                bs.get("se_of") == "all" else {}
            pts.append({"n": n, "bs": bs, "ref": rf, "floor": fl, "agree": agree})
            b, r, f = bs.get("median"), rf.get("median"), fl.get("median")
            rows.append([
                n, n * k_n, f"{bs.get('solver', '?')}" + ("" if bs.get("se_of") == "all" else " (coefficients only)"),
                fmt_t(f), fmt_t(b), f"{b / f:.1f}" if b and f else "-",
                fmt_t(r) if r else rf.get("error", "-"), f"{r / b:.1f}" if b and r else "-",
                fmt_b(bs.get("peak")), fmt_b(bs.get("growth")), fmt_b(rf.get("growth")) if r else "-",
                fmt_b(fl.get("growth")), worst_rel(agree),
            ])
            log(f"  N={n}: bs {fmt_t(b)} ({bs.get('solver')}), ref {fmt_t(r) if r else rf.get('error')}, "
                f"floor {fmt_t(f)}, bs peak {fmt_b(bs.get('peak'))}")
        results["curve_n"] = pts
        report += [f"## Against N (T = {t_n}, K_i = {k_n}; FGLS + standard errors, Ledoit-Wolf diagonal target)", "",
                   table(["N", "K", "bs solver", "floor W'W", "blocksur", "bs/floor", "numpy ref", "ref/bs",
                          "bs peak RSS", "bs growth", "ref growth", "floor growth", "bs vs ref (rel)"], rows), ""]
        _plot_curve(pts, "n", os.path.join(a.out, f"scale-n{'-quick' if q else ''}.png"), f"T={t_n}, K_i={k_n}")
        report += [f"![time and memory against N](out/scale-n{'-quick' if q else ''}.png)", ""]

    # ---- curve against T (and the Parquet files) --------------------------------------------
    paths = {}
    n_t, k_t = 10, 5
    ts = [1000, 10_000, 100_000] if q else [1000, 10_000, 100_000, 1_000_000, 10_000_000]
    if "t" in sections or ("targets" in sections and "3" in tsel):
        for t in (ts if "t" in sections else ts[-1:]):
            path = os.path.join(data_dir, f"rows-{t}.parquet")
            if not os.path.exists(path):
                t0 = time.perf_counter()
                write_parquet(path, n_t, t, k_t)
                log(f"(wrote {path}: {os.path.getsize(path) / GB:.2f} GB in {time.perf_counter() - t0:.0f} s)")
            paths[t] = path
    if "t" in sections:
        wait_idle()
        log(f"\n== time and peak memory against T (N={n_t}, K_i={k_t}, two-step FGLS with standard errors, ML Omega)")
        rows, pts = [], []
        for t in ts:
            inmem = t <= 1_000_000
            reps = 5 if t <= 100_000 else (3 if t <= 1_000_000 else 1)
            if q:
                reps = 3
            sv = {w: os.path.join(data_dir, f"t{t}-{w}.npz") for w in ("stream", "bs", "ref")}
            st = run_worker({"kind": "stream", "n": n_t, "t": t, "k": k_t, "path": paths[t], "repeats": reps,
                             "save": sv["stream"]}, log)
            bs = run_worker({"kind": "bs", "n": n_t, "t": t, "k": k_t, "repeats": reps, "save": sv["bs"]},
                            log) if inmem else {}
            rf = run_worker({"kind": "ref", "n": n_t, "t": t, "k": k_t, "repeats": reps, "save": sv["ref"]},
                            log) if inmem else {}
            fl = run_worker({"kind": "floor", "n": n_t, "t": t, "k": k_t, "repeats": reps}, log) if inmem else {}
            agree = {"stream-bs": compare_saved(sv["stream"], sv["bs"]),
                     "stream-ref": compare_saved(sv["stream"], sv["ref"]),
                     "bs-ref": compare_saved(sv["bs"], sv["ref"])}
            pts.append({"t": t, "bs": bs, "ref": rf, "floor": fl, "stream": st, "agree": agree})
            b, r, f, s = bs.get("median"), rf.get("median"), fl.get("median"), st.get("median")
            rows.append([f"{t:.0e}", fmt_t(f), fmt_t(b), fmt_t(r), fmt_t(s), f"{b / s:.2f}" if b and s else "-",
                         f"{t / s / 1e6:.2f}" if s else "-", fmt_b(bs.get("peak")), fmt_b(st.get("peak")),
                         fmt_b(rf.get("growth")), fmt_b(fl.get("growth")), worst_rel(agree["stream-bs"]),
                         worst_rel(agree["stream-ref"]), worst_rel(agree["bs-ref"])])
            log(f"  T={t}: bs {fmt_t(b)}, stream {fmt_t(s)} (peak {fmt_b(st.get('peak'))}), ref {fmt_t(r)}, floor {fmt_t(f)}")
        results["curve_t"] = pts
        report += [f"## Against T (N = {n_t}, K_i = {k_t}; FGLS + standard errors, ML Omega)", "",
                   "In memory up to 10^6 rows; the Parquet stream (`fit_parquet`, record batches of 65,536 rows from row groups of "
                   f"{BLOCK} rows, one read of the file, snappy-compressed) at every T.", "",
                   table(["T", "floor W'W", "blocksur in memory", "numpy ref", "Parquet stream",
                          "in-memory/stream", "stream M rows/s", "in-memory peak RSS", "stream peak RSS",
                          "ref growth", "floor growth", "stream vs in-memory", "stream vs ref",
                          "in-memory vs ref"], rows), ""]
        _plot_curve(pts, "t", os.path.join(a.out, f"scale-t{'-quick' if q else ''}.png"), f"N={n_t}, K_i={k_t}")
        report += [f"![time and memory against T](out/scale-t{'-quick' if q else ''}.png)", ""]

    # ---- targets ------------------------------------------------------------------------------
    if "targets" in sections:
        wait_idle()
        log("\n== targets")
        r1 = r2 = s3 = m3 = r3 = d4 = i4 = mb = ml = {}
        eq3, eq3_ref, eq4, eq4_ref = {}, {}, {}, {}
        if "1" in tsel:
            # 1. N=2000, T=500, K_i=4, Ledoit-Wolf: FGLS with standard errors
            n1 = (300, 100, 4) if q else (2000, 500, 4)
            r1 = run_worker({"kind": "bs", "n": n1[0], "t": n1[1], "k": n1[2], "omega": "ledoit-wolf",
                             "solver": "auto", "repeats": 1 if not q else 3}, log)
            ok = "error" not in r1 and r1.get("se_of") == "all" and r1["median"] < 60 and r1["peak"] < 8 * GB
            targets.append([f"N={n1[0]}, T={n1[1]}, K_i={n1[2]}, Ledoit-Wolf: FGLS with standard errors",
                            "< 60 s, < 8 GB peak", f"{fmt_t(r1.get('median'))}, peak {fmt_b(r1.get('peak'))} "
                            f"({r1.get('solver')}, shrinkage {r1.get('shrinkage', float('nan')):.3f})",
                            "PASS" if ok else "FAIL"])
            log(f"  target 1: {targets[-1]}")
            wait_idle()
        if "2" in tsel:
            # 2. N=10000, T=1000, K_i=4 via CG: coefficients
            n2 = (1000, 200, 4) if q else (10_000, 1000, 4)
            r2 = run_worker({"kind": "bs", "n": n2[0], "t": n2[1], "k": n2[2], "omega": "ledoit-wolf",
                             "solver": "cg", "repeats": 1}, log, timeout=3600)
            c2 = float(np.median(r2["coef_seconds"])) if r2.get("coef_seconds") else float("nan")
            ok = "error" not in r2 and r2.get("solver") == "cg" and c2 < 600 and r2["peak"] < 16 * GB
            targets.append([f"N={n2[0]}, T={n2[1]}, K_i={n2[2]} via CG (Ledoit-Wolf): coefficients",
                            "< 10 min, < 16 GB peak",
                            f"coefficients {fmt_t(c2)}, peak {fmt_b(r2.get('peak'))} (CG iterations "
                            f"{r2.get('cg_iterations')})", "PASS" if ok else "FAIL"])
            log(f"  target 2: {targets[-1]}")
            wait_idle()
        if "3" in tsel:
            # 3. Parquet stream at the largest T against the in-memory fit of the same rows
            t3 = ts[-1]
            sv_s, sv_m = os.path.join(data_dir, "t3-stream.npz"), os.path.join(data_dir, "t3-inmem.npz")
            reps3 = 3 if q else 2
            s3 = run_worker({"kind": "stream", "n": n_t, "t": t3, "k": k_t, "path": paths[t3], "repeats": reps3,
                             "save": sv_s}, log)
            m3 = run_worker({"kind": "inmem_from_parquet", "n": n_t, "t": t3, "k": k_t, "path": paths[t3],
                             "repeats": reps3, "save": sv_m}, log)
            eq3 = compare_saved(sv_s, sv_m) if "error" not in s3 and "error" not in m3 else {}
            # the numpy reference on the same rows, as a third opinion on which of the two is off
            sv_r = os.path.join(data_dir, "t3-ref.npz")
            need = 8 * t3 * (n_t * (k_t + 1)) * 2.5
            if _available_memory() > need + 2 * GB:
                r3 = run_worker({"kind": "ref", "n": n_t, "t": t3, "k": k_t, "repeats": 1, "save": sv_r}, log)
            else:
                r3 = {"error": f"skipped: needs about {need / GB:.0f} GB"}
            eq3_ref = {"stream": compare_saved(sv_s, sv_r), "inmem": compare_saved(sv_m, sv_r)}
            thr = m3.get("median", np.nan) / s3.get("median", np.nan)
            worst = max(eq3.values()) if eq3 else float("nan")
            ok = s3.get("peak", 1e99) < 1 * GB and thr >= 0.5 and worst <= 1e-10
            targets.append([f"T={t3:.0e}, N={n_t}, K_i={k_t} from Parquet in chunks",
                            "peak < 1 GB, throughput >= 50% of in-memory, equal to 1e-10",
                            f"peak {fmt_b(s3.get('peak'))}; stream {fmt_t(s3.get('median'))} vs in-memory fit "
                            f"{fmt_t(m3.get('median'))} (data already in memory; reading it took "
                            f"{fmt_t(m3.get('read_seconds'))}): throughput {100 * thr:.0f}%; "
                            f"max rel. difference {worst:.1e}; against the numpy reference (coef, se): stream "
                            f"{worst_rel(eq3_ref['stream'])}, in-memory {worst_rel(eq3_ref['inmem'])}"
                            + (f" ({r3['error']})" if "error" in r3 else ""), "PASS" if ok else "FAIL"])
            log(f"  target 3: {targets[-1]}")
            wait_idle()
        if "4" in tsel:
            # 4. Dask LocalCluster equals the in-memory fit
            t4 = 100_000 if q else 1_000_000
            p4 = paths.get(t4) or os.path.join(data_dir, f"rows-{t4}.parquet")
            if not os.path.exists(p4):
                write_parquet(p4, n_t, t4, k_t)
            sv_d, sv_i = os.path.join(data_dir, "t4-dask.npz"), os.path.join(data_dir, "t4-inmem.npz")
            d4 = run_worker({"kind": "dask", "n": n_t, "t": t4, "k": k_t, "path": p4, "save": sv_d}, log)
            i4 = run_worker({"kind": "inmem_from_parquet", "n": n_t, "t": t4, "k": k_t, "path": p4, "save": sv_i}, log)
            eq4 = compare_saved(sv_d, sv_i) if "error" not in d4 and "error" not in i4 else {}
            sv_r4 = os.path.join(data_dir, "t4-ref.npz")
            run_worker({"kind": "ref", "n": n_t, "t": t4, "k": k_t, "repeats": 1, "save": sv_r4}, log)
            eq4_ref = {"dask": compare_saved(sv_d, sv_r4), "inmem": compare_saved(sv_i, sv_r4)}
            worst4 = max(eq4.values()) if eq4 else float("nan")
            targets.append([f"Dask LocalCluster (2 worker processes), T={t4:.0e}, N={n_t}, K_i={k_t}, "
                            "dask DataFrame from Parquet", "equals the in-memory fit to 1e-10",
                            f"max rel. difference {worst4:.1e} (coef, se, Omega, loglik); against the numpy "
                            f"reference (coef, se): Dask {worst_rel(eq4_ref['dask'])}, in-memory "
                            f"{worst_rel(eq4_ref['inmem'])}; cluster fit {fmt_t(d4.get('median'))} (cluster "
                            "start not included)", "PASS" if worst4 <= 1e-10 else "FAIL"])
            log(f"  target 4: {targets[-1]}")
            wait_idle()
        if "5" in tsel:
            # 5. many systems
            g5 = 2000 if q else 10_000
            mb = run_worker({"kind": "many_batch", "g": g5, "n": 3, "t": 60, "k": 3, "repeats": 5}, log)
            loop_n = 500 if q else 2000
            ml = run_worker({"kind": "many_loop", "g": g5, "n": 3, "t": 60, "k": 3, "loop_systems": loop_n,
                             "repeats": 3}, log)
            loop_full = ml.get("median", np.nan) * g5 / loop_n
            speed = loop_full / mb.get("median", np.nan)
            cpu = mb.get("cpu_over_wall", np.nan)
            ok = speed >= 10 and cpu >= 1.5
            targets.append([f"{g5} systems of N=3, T=60, K_i=3 (fit_stacked, FGLS + se)",
                            ">= 10x a Python loop of EquationSystem(...).fit, both cores",
                            f"batch {fmt_t(mb.get('median'))} (CPU/wall {cpu:.2f}); loop {fmt_t(loop_full)} "
                            f"(median of {loop_n} systems x {g5 // loop_n}): {speed:.0f}x", "PASS" if ok else "FAIL"])
            log(f"  target 5: {targets[-1]}")
        results["targets"] = {"1": r1, "2": r2, "3": {"stream": s3, "inmem": m3, "ref": r3, "agree": eq3,
                                                     "agree_ref": eq3_ref},
                              "4": {"dask": d4, "inmem": i4, "agree": eq4, "agree_ref": eq4_ref},
                              "5": {"batch": mb, "loop": ml}}
        report += ["## Targets", "", table(["target", "goal", "measured", ""], targets), ""]

    meta["loadavg_end"] = [round(x, 2) for x in os.getloadavg()]
    report += [f"1-min load average at the end: {meta['loadavg_end'][0]}.", ""]
    text = "\n".join(report)
    log("\n" + text)
    tag = ("quick-" if q else "") + stamp
    with open(os.path.join(a.out, f"scale-{tag}.md"), "w") as f:
        f.write(text)
    with open(os.path.join(a.out, "latest-scale-quick.md" if q else "latest-scale.md"), "w") as f:
        f.write(text)
    with open(os.path.join(a.out, f"scale-{tag}.json"), "w") as f:
        json.dump(results, f, indent=1, default=float)
    with open(os.path.join(a.out, f"scale-log-{tag}.txt"), "w") as f:
        f.write("\n".join(lines))
    if not a.keep_data and not a.data_dir:
        shutil.rmtree(data_dir, ignore_errors=True)
    return 0


def _plot_curve(pts, axis, path, title):
    import matplotlib

    matplotlib.use("Agg")
    import matplotlib.pyplot as plt

    fig, (ax1, ax2) = plt.subplots(1, 2, figsize=(11, 4.2))
    series = [("bs", "blocksur (in memory)", "o-"), ("ref", "numpy reference", "s--"),
              ("floor", "floor: numpy W'W", "^:"), ("stream", "blocksur Parquet stream", "d-")]
    for key, label, style in series:
        xs = [p[axis] for p in pts if p.get(key) and "median" in p[key]]
        if not xs:
            continue
        ax1.plot(xs, [p[key]["median"] for p in pts if p.get(key) and "median" in p[key]], style, label=label)
        ax2.plot(xs, [max(p[key]["growth"], 1e5) / 1e6 for p in pts if p.get(key) and "median" in p[key]],
                 style, label=label)
    for p in pts:  # the points where blocksur took the matrix-free path
        b = p.get("bs") or {}
        if b.get("solver") == "cg" and "median" in b:
            ax1.annotate("CG, coefficients only", (p[axis], b["median"]), textcoords="offset points",
                         xytext=(-10, -14), ha="right", fontsize=8)
    for ax, lab in ((ax1, "median wall time (s)"),
                    (ax2, "peak RSS growth over data + libraries (MB)")):
        ax.set_xscale("log")
        ax.set_yscale("log")
        ax.set_xlabel("N (equations)" if axis == "n" else "T (rows)")
        ax.set_ylabel(lab)
        ax.grid(True, which="both", alpha=0.3)
        ax.legend(fontsize=8)
    fig.suptitle(f"blocksur scaling against {'N' if axis == 'n' else 'T'} ({title})")
    fig.tight_layout()
    fig.savefig(path, dpi=110)
    plt.close(fig)


if __name__ == "__main__":
    sys.exit(main())
