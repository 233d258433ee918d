"""Core benchmarks for blocksur: time, memory and BLAS-thread behaviour.

    .venv/bin/python benchmarks/bench_core.py            # full run (several minutes)
    .venv/bin/python benchmarks/bench_core.py --quick    # cases (a), (b), few repeats

Everything is reported as medians over repeats and as ratios against references
timed in the same process (the machine is shared and noisy; absolute times are
only indicative).  See benchmarks/README.md for the meaning of every column.
"""

from __future__ import annotations

import argparse
import datetime as _dt
import gc
import json
import math
import os
import platform
import subprocess
import sys
import time
import warnings

HERE = os.path.dirname(os.path.abspath(__file__))
sys.path.insert(0, HERE)

import numpy as np  # noqa: E402

import cases  # noqa: E402
import numpy_reference as ref  # noqa: E402

RTOL = 1e-8

# per-case settings: samples (repeats) for the fast methods, minimum time of one
# sample (inner loops are added until a sample lasts this long), the two max_iter
# values used for the per-iteration IFGLS cost, and statsmodels-dense repeats.
FULL = {
    "a": dict(repeats=31, min_sample=0.02, iters=(2, 22), dense=7),
    "b": dict(repeats=31, min_sample=0.02, iters=(2, 22), dense=3),
    "c": dict(repeats=15, min_sample=0.02, iters=(2, 22), dense=0),
    "d": dict(repeats=5, min_sample=0.0, iters=(2, 5), dense=0),
}
QUICK = {
    "a": dict(repeats=5, min_sample=0.005, iters=(2, 12), dense=2),
    "b": dict(repeats=5, min_sample=0.005, iters=(2, 12), dense=1),
    "c": dict(repeats=3, min_sample=0.005, iters=(2, 6), dense=0),
    "d": dict(repeats=2, min_sample=0.0, iters=(2, 3), dense=0),
}
ROUNDS = 7     # every method is timed in up to ROUNDS blocks, in rotating order
PAUSE = 0.25   # seconds of sleep before each block: lets the other BLAS pool park


# ---------------------------------------------------------------------------
# timing
# ---------------------------------------------------------------------------

def _time_block(fn, inner, n):
    out = []
    for _ in range(n):
        t0 = time.perf_counter()
        for _ in range(inner):
            fn()
        out.append((time.perf_counter() - t0) / inner)
    return out


def time_methods(methods: dict, repeats: int, min_sample: float, rounds: int = ROUNDS,
                 pause: float = PAUSE, log=print) -> dict:
    """Median-friendly timing: per method, `repeats` samples split into `rounds`
    blocks; methods visited in rotating order; a warm-up call and a short pause
    before every block; gc disabled while sampling.  Returns name -> samples (s)."""
    names = list(methods)
    inner, slow = {}, {}
    for nm in names:  # warm-up + calibration
        fn = methods[nm]
        t0 = time.perf_counter()
        fn()
        t = time.perf_counter() - t0
        if min_sample > 0:
            t0 = time.perf_counter()
            fn()
            t = max(time.perf_counter() - t0, 1e-7)
        inner[nm] = max(1, math.ceil(min_sample / t)) if min_sample > 0 else 1
        slow[nm] = t > 0.2
    rounds = max(1, min(rounds, repeats))
    per_round = [repeats // rounds + (1 if r < repeats % rounds else 0) for r in range(rounds)]
    samples = {nm: [] for nm in names}
    for r in range(rounds):
        if per_round[r] == 0:
            continue
        order = names[r % len(names):] + names[:r % len(names)]
        for nm in order:
            gc.collect()
            time.sleep(pause)
            if not slow[nm]:
                methods[nm]()  # warm-up after the switch
            gc.disable()
            try:
                samples[nm] += _time_block(methods[nm], inner[nm], per_round[r])
            finally:
                gc.enable()
    return samples


def time_paired(fa, fb, repeats, min_sample, pause=PAUSE):
    """Adjacent timings of fa and fb (order alternating), for a robust median of
    t(fb) - t(fa) on a noisy machine.  Returns (samples_a, samples_b, diffs)."""
    fa(), fb()
    t0 = time.perf_counter()
    fb()
    t = max(time.perf_counter() - t0, 1e-7)
    inner = max(1, math.ceil(min_sample / t)) if min_sample > 0 else 1
    sa, sb, dd = [], [], []
    gc.collect()
    time.sleep(pause)
    fa(), fb()
    gc.disable()
    try:
        for r in range(repeats):
            if r % 2 == 0:
                a = _time_block(fa, inner, 1)[0]
                b = _time_block(fb, inner, 1)[0]
            else:
                b = _time_block(fb, inner, 1)[0]
                a = _time_block(fa, inner, 1)[0]
            sa.append(a)
            sb.append(b)
            dd.append(b - a)
    finally:
        gc.enable()
    return sa, sb, dd


def time_pairs(fa, fb, pairs, min_sample, pause=PAUSE):
    """Timings of fa and fb taken in adjacent pairs (order alternating; before each block a
    pause and, for calls under 0.2 s, a warm-up call, as in `time_methods`), for the ratio of
    two methods on a host whose speed drifts between states over seconds: `time_methods`'
    rotating blocks put the two methods of a ratio seconds apart, often in different states
    (case (a) at 12:57 on 2026-12-03: blocksur's blocks at 63-67, 113-118, 119-133 us, the
    reference's at 433-463, 371-405, 725-967 us). Returns (samples_a, samples_b)."""
    inner, slow = {}, {}
    for key, fn in (("a", fa), ("b", fb)):
        fn()
        t0 = time.perf_counter()
        fn()
        t = max(time.perf_counter() - t0, 1e-7)
        inner[key] = max(1, math.ceil(min_sample / t)) if min_sample > 0 else 1
        slow[key] = t > 0.2
    sa, sb = [], []
    for r in range(pairs):
        order = (("a", fa), ("b", fb)) if r % 2 == 0 else (("b", fb), ("a", fa))
        got = {}
        for key, fn in order:
            gc.collect()
            time.sleep(pause)
            if not slow[key]:
                fn()  # warm-up after the switch
            gc.disable()
            try:
                got[key] = _time_block(fn, inner[key], 1)[0]
            finally:
                gc.enable()
        sa.append(got["a"])
        sb.append(got["b"])
    return sa, sb


def med(x):
    return float(np.median(x)) if x else float("nan")


def fmt_t(s):
    if s is None or not np.isfinite(s):
        return "n/a"
    if s >= 10:
        return f"{s:.1f} s"
    if s >= 1:
        return f"{s:.2f} s"
    ms = s * 1e3
    if ms >= 100:
        return f"{ms:.0f} ms"
    if ms >= 10:
        return f"{ms:.1f} ms"
    if ms >= 1:
        return f"{ms:.2f} ms"
    return f"{ms * 1e3:.0f} us" if ms * 1e3 >= 10 else f"{ms * 1e3:.1f} us"


def fmt_r(x, digits=2):
    if x is None or not np.isfinite(x):
        return "n/a"
    if abs(x) >= 100:
        return f"{x:.0f}x"
    if abs(x) >= 10:
        return f"{x:.1f}x"
    return f"{x:.{digits}f}x"


def fmt_b(n):
    for unit, f in (("GB", 1e9), ("MB", 1e6), ("kB", 1e3)):
        if abs(n) >= f:
            return f"{n / f:.1f} {unit}"
    return f"{n} B"


def table(headers, rows):
    cols = list(zip(*([headers] + rows))) if rows else [[h] for h in headers]
    w = [max(len(str(c)) for c in col) for col in cols]
    line = "| " + " | ".join(str(h).ljust(w[i]) for i, h in enumerate(headers)) + " |"
    sep = "|" + "|".join("-" * (w[i] + 2) for i in range(len(headers))) + "|"
    body = ["| " + " | ".join(str(c).ljust(w[i]) for i, c in enumerate(r)) + " |" for r in rows]
    return "\n".join([line, sep] + body)


# ---------------------------------------------------------------------------
# references
# ---------------------------------------------------------------------------

def dense_statsmodels_fgls(ys, Xs):
    """Two-step FGLS the textbook way: OLS residuals -> Omega, then statsmodels GLS
    on the stacked system with block-diagonal X and sigma = Omega kron I_T."""
    import scipy.linalg as sla
    import statsmodels.api as sm

    T = len(ys[0])
    U = np.column_stack([sm.OLS(y, X).fit().resid for y, X in zip(ys, Xs)])
    Om = U.T @ U / T
    res = sm.GLS(np.concatenate(ys), sla.block_diag(*Xs), sigma=np.kron(Om, np.eye(T))).fit()
    # Cov(b) = (X' Sigma^-1 X)^-1 (no residual-variance rescaling)
    se = np.sqrt(np.diag(res.normalized_cov_params))
    return res.params, se


class SystemFloor:
    """W'W through the *system* OpenBLAS (the one blocksur links), via ctypes cblas_dsyrk.
    Informational: shows how much of blocksur's ratio is due to the BLAS build."""

    def __init__(self):
        import ctypes
        import ctypes.util

        self.lib = None
        for name in ("libopenblas.so.0", ctypes.util.find_library("openblas")):
            if not name:
                continue
            try:
                self.lib = ctypes.CDLL(name)
                break
            except OSError:
                continue
        if self.lib is not None:
            f = self.lib.cblas_dsyrk
            c_int, c_double, c_void_p = ctypes.c_int, ctypes.c_double, ctypes.c_void_p
            f.argtypes = [c_int, c_int, c_int, c_int, c_int, c_double, c_void_p, c_int,
                          c_double, c_void_p, c_int]
            f.restype = None
            self.f = f

    def __call__(self, W, out):
        # W C-contiguous T x P (row major); out = W'W (upper triangle only)
        T, P = W.shape
        self.f(101, 121, 112, P, T, 1.0, W.ctypes.data, P, 0.0, out.ctypes.data, P)


# ---------------------------------------------------------------------------
# one case
# ---------------------------------------------------------------------------

def run_case(name, cfg, blocksur, log, with_dense=True, sysfloor=None):
    N, T, k = cases.CASES[name]
    log(f"\n=== case ({name}): N={N}, T={T}, K_i={k} ===")
    t0 = time.perf_counter()
    s = cases.make_case(name)
    log(f"data generated in {time.perf_counter() - t0:.2f} s; input {fmt_b(s.input_bytes)}; "
        f"K={s.K}, P=K+N={s.P}")
    d = s.as_dict()
    ys, Xs = s.ys, s.Xs
    WC = s.stacked("C")
    WF = s.stacked("F")
    r = {"case": name, "N": N, "T": T, "k": k, "K": s.K, "P": s.P,
         "input_bytes": s.input_bytes, "checks": {}, "times": {}, "notes": []}

    # ---- correctness before timing ------------------------------------------
    rf = ref.fgls(ys, Xs, se=True)
    checks = r["checks"]
    if blocksur is not None:
        try:
            bs_sys = blocksur.EquationSystem(d)
            f = bs_sys.fit(method="fgls")
            what = ("coef", "se", "omega") + (("vcov",) if s.K <= 400 else ())
            checks["fgls"] = ref.check_against(f, rf, s.names, s.ks, what=what)
            fo = bs_sys.fit(method="ols")
            ro = ref.ols(ys, Xs)
            checks["ols"] = ref.check_against(fo, ro, s.names, s.ks, what=("coef",))
            # IFGLS after exactly 3 GLS steps (tol=0): same iterates, so rtol 1e-8
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                f3 = bs_sys.fit(method="ifgls", tol=0.0, max_iter=3)
            r3 = ref.ifgls(ys, Xs, tol=0.0, max_iter=3, moments=rf.extra["moments"])
            checks["ifgls3"] = ref.check_against(f3, r3, s.names, s.ks, what=("coef", "omega"))
            # converged IFGLS (skipped on (d): dozens of K x K Cholesky factorisations)
            if s.K <= 1000:
                fi = bs_sys.fit(method="ifgls", tol=1e-10, max_iter=1000)
                ri = ref.ifgls(ys, Xs, tol=1e-12, max_iter=1000,
                               moments=rf.extra["moments"])
                checks["ifgls"] = ref.check_against(fi, ri, s.names, s.ks, what=("coef",))
                r["ifgls_default_n_iter"] = int(fi.n_iter)
                r["ifgls_default_converged"] = bool(fi.converged)
                r["ref_ifgls_n_iter"] = int(ri.n_iter)
            if name == "a":  # informational: which "dof" convention blocksur uses
                fd = bs_sys.fit(method="fgls", omega="dof")
                rd = ref.fgls(ys, Xs, omega="dof", se=False)
                checks["info_dof_sqrt_convention"] = ref.check_against(
                    fd, rd, s.names, s.ks, what=("coef", "omega"))
        except Exception as e:  # report, keep timing what can be timed
            r["notes"].append(f"blocksur check raised {type(e).__name__}: {e}")
            log(f"!! blocksur check raised {type(e).__name__}: {e}")
    ok = True
    for meth, errs in checks.items():
        for part, e in errs.items():
            tol = 1e-6 if meth == "ifgls" else RTOL
            good = e <= tol
            if not meth.startswith("info"):
                ok &= good
            tag = "info" if meth.startswith("info") else ("ok" if good else "MISMATCH")
            log(f"  check {meth:>6}.{part:<6} rel err {e:.2e}  (tol {tol:.0e}) {tag}")
    if "ifgls" in checks:
        log(f"  ifgls n_iter: blocksur {r['ifgls_default_n_iter']} (tol 1e-10, converged="
            f"{r['ifgls_default_converged']}), reference {r['ref_ifgls_n_iter']} (tol 1e-12)")
    r["checks_ok"] = bool(ok) if checks else None

    # ---- timing ---------------------------------------------------------------
    m1, m2 = cfg["iters"]
    methods = {
        "floor_C": lambda: WC.T @ WC,
        "floor_F": lambda: WF.T @ WF,
        "ref_fgls": lambda: ref.fgls(ys, Xs, se=False),
        "ref_fgls_se": lambda: ref.fgls(ys, Xs, se=True),
    }
    if sysfloor is not None and sysfloor.lib is not None:
        outP = np.empty((s.P, s.P))
        methods["floor_sysblas"] = lambda: sysfloor(WC, outP)
    n_iter = {}
    if blocksur is not None:
        EqS = blocksur.EquationSystem
        sys0 = EqS(d)

        def ifgls_fixed(m):
            def run():
                with warnings.catch_warnings():
                    warnings.simplefilter("ignore")
                    return sys0.fit(method="ifgls", tol=0.0, max_iter=m).coef
            return run

        def fgls_se():
            f = EqS(d, copy=False).fit(method="fgls")
            f.coef
            return f.se

        for m in (m1, m2):
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                n_iter[m] = int(sys0.fit(method="ifgls", tol=0.0, max_iter=m).n_iter)
        methods.update({
            # the estimators are timed on systems that keep references to the data (copy=False),
            # as the numpy reference and the floor use the arrays they are given; the default
            # construction, which copies the data once, is timed on its own (bs construct)
            "bs_construct": lambda: EqS(d),
            "bs_ols": lambda: EqS(d, copy=False).fit(method="ols").coef,
            "bs_fgls": lambda: EqS(d, copy=False).fit(method="fgls").coef,
            "bs_fgls_se": fgls_se,
            "bs_fgls_prebuilt": lambda: sys0.fit(method="fgls").coef,
        })
    t0 = time.perf_counter()
    r["loadavg_before"] = round(os.getloadavg()[0], 2)
    samples = time_methods(methods, cfg["repeats"], cfg["min_sample"], log=log)
    if blocksur is not None:
        # per-iteration IFGLS cost: paired adjacent timings of max_iter=m1 and m2
        sa, sb, dd = time_paired(ifgls_fixed(m1), ifgls_fixed(m2), cfg["repeats"],
                                 cfg["min_sample"])
        samples[f"bs_ifgls_{m1}"], samples[f"bs_ifgls_{m2}"] = sa, sb
        samples["bs_ifgls_diff"] = dd
        # the ratio targets again, from pairs of adjacent samples (see `time_pairs`); at least
        # 9 pairs (case (d) has 5 repeats: its pairs' ratios spread over 0.8-2.1 in one run)
        pairs = max(cfg["repeats"], 9)
        if name == "a":
            sa, sb = time_pairs(methods["bs_fgls_se"], methods["ref_fgls_se"], pairs,
                                cfg["min_sample"])
            samples["pair_bs_fgls_se"], samples["pair_ref_fgls_se"] = sa, sb
        if name in ("c", "d"):
            order = "C" if med(samples["floor_C"]) <= med(samples["floor_F"]) else "F"
            sa, sb = time_pairs(methods[f"floor_{order}"], methods["bs_fgls"], pairs,
                                cfg["min_sample"])
            samples["pair_floor"], samples["pair_bs_fgls"] = sa, sb
    r["loadavg_after"] = round(os.getloadavg()[0], 2)
    log(f"timed {len(methods)} methods x {cfg['repeats']} samples in "
        f"{time.perf_counter() - t0:.1f} s (1-min loadavg {r['loadavg_before']} -> "
        f"{r['loadavg_after']})")

    if with_dense and cfg["dense"] > 0:
        # each call timed on its own (first result also checked); these are slow
        t0 = time.perf_counter()
        sm_samples = []
        for rep in range(cfg["dense"]):
            gc.collect()
            time.sleep(PAUSE)
            t1 = time.perf_counter()
            pd_ = dense_statsmodels_fgls(ys, Xs)
            sm_samples.append(time.perf_counter() - t1)
            if rep == 0:
                checks["dense_sm_vs_ref"] = {"coef": ref.rel_err(pd_[0], rf.coef_flat),
                                             "se": ref.rel_err(pd_[1], rf.se_flat)}
                log(f"  dense statsmodels vs numpy reference: coef rel err "
                    f"{checks['dense_sm_vs_ref']['coef']:.1e}, se "
                    f"{checks['dense_sm_vs_ref']['se']:.1e}")
            del pd_
        samples["sm_dense"] = sm_samples
        log(f"timed dense statsmodels x {cfg['dense']} in {time.perf_counter() - t0:.1f} s")

    r["samples"] = samples
    tm = {k_: med(v) for k_, v in samples.items()}
    r["times"] = tm
    floor = min(tm["floor_C"], tm["floor_F"])
    r["floor"] = floor
    r["floor_order"] = "C" if tm["floor_C"] <= tm["floor_F"] else "F"
    if n_iter:
        dn = n_iter[m2] - n_iter[m1]
        r["n_iter_fixed"] = n_iter
        r["per_iter"] = tm["bs_ifgls_diff"] / dn if dn > 0 else float("nan")
    return r


# ---------------------------------------------------------------------------
# subprocess parts
# ---------------------------------------------------------------------------

def _run_worker(args, env=None, timeout=1800):
    cmd = [sys.executable, os.path.join(HERE, "_workers.py")] + args
    p = subprocess.run(cmd, capture_output=True, text=True, env=env, timeout=timeout)
    if p.returncode != 0:
        raise RuntimeError(f"worker {' '.join(args)} failed ({p.returncode}):\n{p.stderr[-3000:]}")
    return json.loads(p.stdout.strip().splitlines()[-1])


def run_memory(case, log):
    log(f"\n=== peak memory, case ({case}), each in a fresh subprocess ===")
    out = {}
    for what in ("bs_fgls", "bs_fgls_se", "bs_ifgls", "ref_fgls_se", "floor"):
        try:
            out[what] = _run_worker(["mem", "--case", case, "--what", what])
            m = out[what]
            stages = "; ".join(f"{st['stage']}: peak +{fmt_b(st['peak_inc'])}, "
                               f"kept +{fmt_b(st['rss_after_inc'])}" for st in m["stages"])
            log(f"  {what:<12} peak +{fmt_b(m['peak_inc'])}  [{stages}]")
        except Exception as e:
            out[what] = {"error": str(e)}
            log(f"  {what:<12} FAILED: {e}")
    return out


THREAD_CONFIGS = [
    ("default", "library defaults (no limits)", {}),
    ("tpl1", "threadpool_limits(1) around the loop (all BLAS pools)", {}),
    ("env1", "OPENBLAS_NUM_THREADS=1 in the environment", {"OPENBLAS_NUM_THREADS": "1"}),
    ("tpl_np1", "threadpool_limits numpy's OpenBLAS only -> 1", {}),
    ("tpl_bs1", "threadpool_limits system OpenBLAS (blocksur) only -> 1", {}),
]


def run_threads(case, loops, rounds, log):
    log(f"\n=== BLAS thread pools: numpy W'W alternating with blocksur fgls, case ({case}) ===")
    out = {}
    for cfg, desc, extra in THREAD_CONFIGS:
        env = dict(os.environ)
        env.update(extra)
        try:
            out[cfg] = _run_worker(["threads", "--case", case, "--config", cfg,
                                    "--loops", str(loops), "--rounds", str(rounds)], env=env)
            out[cfg]["desc"] = desc
            m = out[cfg]["median"]
            log(f"  {cfg:<8} np alone {fmt_t(m['np_alone'])}, bs alone {fmt_t(m['bs_alone'])}, "
                f"alternating {fmt_t(m['alt_total'])} (np {fmt_t(m['alt_np'])} + "
                f"bs {fmt_t(m['alt_bs'])})")
        except Exception as e:
            out[cfg] = {"error": str(e), "desc": desc}
            log(f"  {cfg:<8} FAILED: {e}")
    return out


# ---------------------------------------------------------------------------
# report
# ---------------------------------------------------------------------------

def build_report(meta, results, mem, thr, quick):
    L = []
    L.append("# blocksur core benchmark results")
    L.append("")
    L.append(f"command: `{meta['command']}`  ")
    L.append(f"date: {meta['date']}  host: {meta['cpu']} ({meta['ncpu']} cpus)  "
             f"loadavg at start: {meta['loadavg_start']}  at end: {meta.get('loadavg_end')}  ")
    L.append(f"python {meta['python']}, numpy {meta['numpy']}, scipy {meta['scipy']}, "
             f"statsmodels {meta['statsmodels']}, blocksur {meta['blocksur']}  ")
    L.append(f"git: {meta.get('git', '?')}; extension: {meta.get('blocksur_so', '?')}  ")
    L.append(f"BLAS env: {meta['blas_env'] or '(none set)'}  ")
    L.append(f"mode: {'QUICK (smoke test, few repeats)' if quick else 'full'}"
             + (f"; timing tables under threadpool_limits({meta['threads_limit']}) for all BLAS pools"
                if meta.get("threads_limit") else "; library-default BLAS threads"))
    L.append("")
    L.append("## Time (medians; ratios from the same run)")
    L.append("")
    hdr = ["case", "N/T/K_i", "floor W'W", "bs fgls", "fgls/floor", "bs fgls+se",
           "ifgls/iter", "iter/floor", "numpy ref (+se)", "speed-up vs ref",
           "sm dense", "speed-up vs dense"]
    rows = []
    for r in results:
        tm = r["times"]
        fl = r["floor"]
        bs = tm.get("bs_fgls", float("nan"))
        bse = tm.get("bs_fgls_se", float("nan"))
        pi = r.get("per_iter", float("nan"))
        rse = tm.get("ref_fgls_se", float("nan"))
        smd = tm.get("sm_dense")
        rows.append([
            f"({r['case']})", f"{r['N']}/{r['T']}/{r['k']}", fmt_t(fl),
            fmt_t(bs), fmt_r(bs / fl), fmt_t(bse), fmt_t(pi), f"{100 * pi / fl:.1f}%" if np.isfinite(pi) else "n/a",
            fmt_t(rse), fmt_r(rse / bse), fmt_t(smd) if smd else "-",
            fmt_r(smd / bse) if smd else "-",
        ])
    L.append(table(hdr, rows))
    L.append("")
    L.append("floor = min over C/F order of numpy `W.T @ W`, W = [X_1..X_N, y_1..y_N];"
             " bs fgls = `EquationSystem(d, copy=False).fit(method='fgls').coef` (construction"
             " included, without the copy of the data the default construction makes: that is"
             " `bs construct` in the details);"
             " bs fgls+se also reads `.se`; ifgls/iter = median of paired differences"
             " t(max_iter=m2) - t(max_iter=m1), divided by n_iter2 - n_iter1, tol=0, on a"
             " prebuilt system; numpy ref and sm dense"
             " include standard errors; speed-ups compare against bs fgls+se.")
    L.append("")
    L.append("### Details")
    L.append("")
    hdr2 = ["case", "floor C", "floor F", "floor sys-BLAS", "bs construct", "bs ols",
            "bs fgls prebuilt", "ifgls m1/m2 (n_iter)", "ref fgls (coef)", "coef speed-up",
            "ifgls conv. n_iter", "loadavg", "checks"]
    rows2 = []
    for r in results:
        tm = r["times"]
        ni = r.get("n_iter_fixed", {})
        nik = sorted(ni)
        it = (f"{fmt_t(tm.get(f'bs_ifgls_{nik[0]}'))}/{fmt_t(tm.get(f'bs_ifgls_{nik[1]}'))} "
              f"({ni[nik[0]]}/{ni[nik[1]]})") if len(nik) == 2 else "n/a"
        worst = {m: max(e.values()) for m, e in r["checks"].items()}
        chk = ", ".join(f"{m} {v:.0e}" for m, v in worst.items()) or "n/a"
        rows2.append([
            f"({r['case']})", fmt_t(tm["floor_C"]), fmt_t(tm["floor_F"]),
            fmt_t(tm.get("floor_sysblas")), fmt_t(tm.get("bs_construct")), fmt_t(tm.get("bs_ols")),
            fmt_t(tm.get("bs_fgls_prebuilt")), it, fmt_t(tm["ref_fgls"]),
            fmt_r(tm["ref_fgls"] / tm.get("bs_fgls", float("nan"))),
            f"{r.get('ifgls_default_n_iter', 'n/a')}",
            f"{r.get('loadavg_before')}->{r.get('loadavg_after')}", chk,
        ])
    L.append(table(hdr2, rows2))
    L.append("")
    L.append("checks: worst normwise relative error vs the numpy reference "
             "(fgls: coef/se/omega[/vcov]; ols: coef; ifgls3: coef/omega after exactly 3 GLS "
             "steps; ifgls: coef, converged fits (not on (d)); "
             "info_dof: omega='dof' vs the sqrt((T-K_i)(T-K_j)) convention, informational).")

    # targets
    L.append("")
    L.append("## Targets")
    L.append("")
    T_ = []
    byc = {r["case"]: r for r in results}

    def add(desc, val, ok, p10="-", paired="-"):
        T_.append([desc, val, paired, "n/a" if ok is None else ("PASS" if ok else "FAIL"), p10])

    def pair_ratio(r, num, den):
        """Median over the pairs of t(num) / t(den) (NaN when not measured)."""
        sm = r.get("samples", {})
        a, b = sm.get(num), sm.get(den)
        return float(np.median(np.array(a) / np.array(b))) if a and b else float("nan")

    def q(r, key, pct=10):
        """pct-th percentile of a method's samples (floor: the better order)."""
        sm = r.get("samples", {})
        if key == "floor":
            return min(q(r, "floor_C", pct), q(r, "floor_F", pct))
        v = sm.get(key)
        return float(np.percentile(v, pct)) if v else float("nan")

    def qiter(r):
        ni = r.get("n_iter_fixed", {})
        if len(ni) != 2:
            return float("nan")
        m1, m2 = sorted(ni)
        dn = ni[m2] - ni[m1]
        return (q(r, f"bs_ifgls_{m2}") - q(r, f"bs_ifgls_{m1}")) / dn if dn > 0 else float("nan")

    for c in ("c", "d"):
        if c in byc:
            x = byc[c]["times"].get("bs_fgls", float("nan")) / byc[c]["floor"]
            xp = pair_ratio(byc[c], "pair_bs_fgls", "pair_floor")
            judged = xp if np.isfinite(xp) else x
            add(f"({c}) FGLS coef <= 1.5x floor", fmt_r(x), bool(judged <= 1.5) if np.isfinite(judged) else None,
                fmt_r(q(byc[c], "bs_fgls") / q(byc[c], "floor")), fmt_r(xp) if np.isfinite(xp) else "-")
            t = byc[c]["times"]
            x = (t.get("bs_fgls", float("nan")) + t.get("bs_construct", float("nan"))) / byc[c]["floor"]
            add(f"({c}) same, with the default construction's copy of the data (information)", fmt_r(x), None,
                fmt_r((q(byc[c], "bs_fgls") + q(byc[c], "bs_construct")) / q(byc[c], "floor")))
    if "c" in byc:
        x = byc["c"].get("per_iter", float("nan")) / byc["c"]["floor"]
        add("(c) each further IFGLS iteration < 5% of floor", f"{100 * x:.1f}%",
            bool(x < 0.05) if np.isfinite(x) else None,
            f"{100 * qiter(byc['c']) / q(byc['c'], 'floor'):.1f}%")
    for r in results:
        x = r["times"].get("ref_fgls_se", float("nan")) / r["times"].get("bs_fgls_se", float("nan"))
        xp = pair_ratio(r, "pair_ref_fgls_se", "pair_bs_fgls_se")
        judged = xp if np.isfinite(xp) else x
        need = 5.0 if r["case"] == "a" else 1.0
        add(f"({r['case']}) faster than numpy ref (fgls+se){' by >= 5x' if need > 1 else ''}",
            fmt_r(x), bool(judged >= need if need > 1 else judged > 1.0) if np.isfinite(judged) else None,
            fmt_r(q(r, "ref_fgls_se") / q(r, "bs_fgls_se")), fmt_r(xp) if np.isfinite(xp) else "-")
    if "b" in byc and byc["b"]["times"].get("sm_dense"):
        x = byc["b"]["times"]["sm_dense"] / byc["b"]["times"].get("bs_fgls_se", float("nan"))
        add("(b) >= 100x vs dense statsmodels", fmt_r(x), bool(x >= 100) if np.isfinite(x) else None,
            fmt_r(q(byc["b"], "sm_dense") / q(byc["b"], "bs_fgls_se")))
    for r in results:
        if r.get("checks_ok") is not None:
            add(f"({r['case']}) blocksur matches numpy reference (rel 1e-8)",
                "yes" if r["checks_ok"] else "NO", r["checks_ok"])
    if mem:
        case = mem.get("_case")
        m = mem.get("bs_fgls", {})
        if "peak_inc" in m:
            budget = 2.5 * m["input_bytes"] + 8 * m["P"] ** 2
            add(f"({case}) peak RSS of construct+fgls <= 2.5x input + 8 P^2",
                f"{fmt_b(m['peak_inc'])} / {fmt_b(budget)} = {m['peak_inc'] / budget:.2f}",
                bool(m["peak_inc"] <= budget) if case == "d" else None)
    L.append(table(["target", "measured (medians)", "paired (median of pair ratios)", "result",
                    "same from 10th percentiles"], T_))
    L.append("")
    L.append("PASS/FAIL uses the paired ratio where one was measured ((a) against the reference, "
             "(c) and (d) against the floor), the ratio of medians otherwise. Paired: the two "
             "methods timed in adjacent samples, order alternating, and the median taken over "
             "the pairs' ratios, so that both sides of each ratio meet the host in the same state "
             "(it drifts between fast and slow states over seconds, and the medians of the "
             "rotating blocks put the two sides in different ones). The last column recomputes "
             "the ratio from each method's 10th-percentile sample: on a loaded 2-core machine "
             "2-thread BLAS calls become bimodal (a delayed worker thread costs whole 4 ms "
             "scheduler ticks), and when the columns disagree the medians are contaminated by "
             "other load.")

    if mem:
        L.append("")
        case = mem.get("_case")
        L.append(f"## Peak memory, case ({case}) (fresh subprocess each; increment over the "
                 "RSS with the data loaded; VmHWM reset via /proc/self/clear_refs)")
        L.append("")
        rows3 = []
        for what, m in mem.items():
            if what.startswith("_"):
                continue
            if "peak_inc" not in m:
                rows3.append([what, "error", "", "", "", "", ""])
                continue
            inp, p2 = m["input_bytes"], 8 * m["P"] ** 2
            budget = 2.5 * inp + p2
            stages = "; ".join(f"{st['stage']} +{fmt_b(st['peak_inc'])}" for st in m["stages"])
            rows3.append([what, fmt_b(inp), fmt_b(p2), fmt_b(m["peak_inc"]),
                          f"{m['peak_inc'] / inp:.2f}", f"{m['peak_inc'] / budget:.2f}", stages])
        L.append(table(["what", "input bytes", "P^2*8", "peak increment", "peak/input",
                        "peak/(2.5 input + 8P^2)", "per-stage peaks"], rows3))
        if any(not m.get("can_reset_hwm", True) for k, m in mem.items() if not k.startswith("_")):
            L.append("\nWARNING: could not reset VmHWM; peaks include data generation.")

    if thr:
        L.append("")
        case = thr.get("_case")
        L.append(f"## BLAS thread pools (case ({case}); numpy `W.T @ W` then blocksur fgls, "
                 "alternating; fresh subprocess per row)")
        L.append("")
        d0 = thr.get("default", {}).get("median")
        rows4 = []
        for cfg, desc, _ in THREAD_CONFIGS:
            x = thr.get(cfg, {})
            if "median" not in x:
                rows4.append([cfg, desc, "error", "", "", "", "", ""])
                continue
            m = x["median"]
            pools = ", ".join(f"{lib['prefix']}:{lib['num_threads']}"
                              for lib in x["threadpool_info_inside"])
            alone = m["np_alone"] + m["bs_alone"]
            rows4.append([
                cfg, pools, fmt_t(m["np_alone"]), fmt_t(m["bs_alone"]),
                f"{fmt_t(m['alt_total'])} ({fmt_t(m['alt_np'])} + {fmt_t(m['alt_bs'])})",
                fmt_r(m["alt_total"] / alone),
                fmt_r(m["alt_total"] / (d0["np_alone"] + d0["bs_alone"])) if d0 else "n/a",
                fmt_r(m["alt_total"] / d0["alt_total"]) if d0 else "n/a",
            ])
        L.append(table(["config", "pools seen (prefix:threads)", "numpy alone", "blocksur alone",
                        "alternating pair (np + bs)", "alt / own alone-sum",
                        "alt / default alone-sum", "alt / default alt"], rows4))
        L.append("")
        for cfg, desc, _ in THREAD_CONFIGS:
            L.append(f"- {cfg}: {desc}")
        x = thr.get("default", {})
        if "threadpool_info_before" in x:
            L.append("")
            L.append("threadpool_info() in the worker after `import blocksur`:")
            for lib in x["threadpool_info_before"]:
                L.append(f"- {lib['prefix']} {lib['version']} ({lib['threading_layer']}, "
                         f"{lib['architecture']}), num_threads={lib['num_threads']}: {lib['filepath']}")
    L.append("")
    L.append("## threadpool_info() in the main process")
    L.append("")
    for when in ("before_import", "after_import"):
        L.append(f"{when.replace('_', ' ')} blocksur:")
        for lib in meta["threadpool_info"].get(when, []):
            L.append(f"- {lib.get('prefix')} {lib.get('version')} num_threads={lib.get('num_threads')}"
                     f" ({lib.get('threading_layer')}, {lib.get('architecture')}): {lib.get('filepath')}")
    notes = [n for r in results for n in r["notes"]]
    if notes:
        L.append("")
        L.append("## Notes")
        L += [f"- {n}" for n in notes]
    return "\n".join(L) + "\n"


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--quick", action="store_true", help="cases (a), (b) only, few repeats")
    ap.add_argument("--cases", default=None, help="comma-separated subset of a,b,c,d")
    ap.add_argument("--no-memory", action="store_true")
    ap.add_argument("--no-threads", action="store_true")
    ap.add_argument("--no-dense", action="store_true", help="skip dense statsmodels")
    ap.add_argument("--threads", type=int, default=None,
                    help="run the timing tables under threadpool_limits(N) (all BLAS pools)")
    ap.add_argument("--out", default=os.path.join(HERE, "out"))
    ap.add_argument("--wait-idle", type=float, default=0.0, metavar="SECONDS",
                    help="before each case, wait up to SECONDS for the 1-min load average "
                         "to drop below 1.0 (shared machine)")
    a = ap.parse_args(argv)

    cfgs = QUICK if a.quick else FULL
    sel = a.cases.split(",") if a.cases else (["a", "b"] if a.quick else ["a", "b", "c", "d"])
    os.makedirs(a.out, exist_ok=True)
    stamp = _dt.datetime.now().strftime("%Y%m%d-%H%M%S")
    log_lines = []

    def log(msg=""):
        print(msg, flush=True)
        log_lines.append(msg)

    import scipy
    import statsmodels
    from threadpoolctl import threadpool_info, threadpool_limits

    tp_before = threadpool_info()
    try:
        import blocksur
        bs_version = getattr(blocksur, "__version__", "?") + f" ({blocksur.__file__})"
    except Exception as e:  # noqa: BLE001
        blocksur = None
        bs_version = f"NOT IMPORTABLE: {type(e).__name__}: {e}"
    tp_after = threadpool_info()
    cpu = platform.processor() or "?"
    try:
        with open("/proc/cpuinfo") as f:
            for line in f:
                if line.startswith("model name"):
                    cpu = line.split(":", 1)[1].strip()
                    break
    except OSError:
        pass
    meta = {
        "command": " ".join([os.path.relpath(sys.executable, os.getcwd())
                             if sys.executable.startswith(os.getcwd()) else sys.executable]
                            + [os.path.relpath(os.path.abspath(__file__), os.getcwd())] + sys.argv[1:]),
        "date": _dt.datetime.now().isoformat(timespec="seconds"),
        "cpu": cpu, "ncpu": os.cpu_count(),
        "loadavg_start": tuple(round(x, 2) for x in os.getloadavg()),
        "python": platform.python_version(), "numpy": np.__version__,
        "scipy": scipy.__version__, "statsmodels": statsmodels.__version__,
        "blocksur": bs_version,
        "blas_env": ", ".join(f"{k}={v}" for k, v in sorted(os.environ.items())
                              if k.startswith(("OPENBLAS_", "OMP_NUM", "MKL_NUM", "GOTO"))),
        "threadpool_info": {"before_import": tp_before, "after_import": tp_after},
        "threads_limit": a.threads,
    }
    try:
        head = subprocess.run(["git", "-C", HERE, "log", "-1", "--format=%h %cI"],
                              capture_output=True, text=True, timeout=10).stdout.strip()
        dirty = subprocess.run(["git", "-C", HERE, "status", "--porcelain", "--", "../src",
                                "../python"], capture_output=True, text=True,
                               timeout=10).stdout.strip()
        meta["git"] = head + (" (+ uncommitted changes in src/ or python/)" if dirty else "")
    except Exception:  # noqa: BLE001
        meta["git"] = "?"
    if blocksur is not None:
        import glob
        sos = glob.glob(os.path.join(os.path.dirname(blocksur.__file__), "_core*.so"))
        meta["blocksur_so"] = ", ".join(
            f"{os.path.basename(p_)} built {_dt.datetime.fromtimestamp(os.path.getmtime(p_)).isoformat(timespec='seconds')}"
            for p_ in sos)
    log(f"blocksur: {bs_version}; git {meta['git']}; {meta.get('blocksur_so', '')}")
    log(f"BLAS env: {meta['blas_env'] or '(none)'}; loadavg {meta['loadavg_start']}; cpus {os.cpu_count()}")
    for lib in tp_after:
        log(f"threadpool: {lib.get('prefix')} {lib.get('version')} threads={lib.get('num_threads')} "
            f"{lib.get('filepath')}")
    if meta["loadavg_start"][0] > 1.0:
        log(f"WARNING: 1-min load average {meta['loadavg_start'][0]} > 1 on a {os.cpu_count()}-cpu "
            "machine: other work is running, OpenBLAS threads will be oversubscribed; "
            "ratios will be noisy.")

    from contextlib import nullcontext
    ctx = threadpool_limits(limits=a.threads) if a.threads else nullcontext()
    sysfloor = SystemFloor() if blocksur is not None else None
    results = []
    def wait_idle():
        if a.wait_idle <= 0:
            return
        t_end = time.time() + a.wait_idle
        while os.getloadavg()[0] >= 1.0 and time.time() < t_end:
            time.sleep(10)
        log(f"(load average {os.getloadavg()[0]:.2f} after waiting for an idle machine)")

    with ctx:
        for c in sel:
            wait_idle()
            results.append(run_case(c, cfgs[c], blocksur, log, with_dense=not a.no_dense,
                                    sysfloor=sysfloor))

    mem = thr = None
    if blocksur is not None and not a.no_memory:
        wait_idle()
        mcase = "d" if "d" in sel else sel[-1]
        mem = run_memory(mcase, log)
        mem["_case"] = mcase
    if blocksur is not None and not a.no_threads:
        wait_idle()
        tcase = "c" if not a.quick else "b"
        thr = run_threads(tcase, loops=20 if not a.quick else 10,
                          rounds=3 if not a.quick else 2, log=log)
        thr["_case"] = tcase
    meta["loadavg_end"] = tuple(round(x, 2) for x in os.getloadavg())

    report = build_report(meta, results, mem, thr, a.quick)
    log("")
    log(report)
    variant = ("quick-" if a.quick else "") + (f"threads{a.threads}-" if a.threads else "")
    tag = variant + stamp
    with open(os.path.join(a.out, f"results-{tag}.md"), "w") as f:
        f.write(report)
    with open(os.path.join(a.out, f"latest-{variant.rstrip('-')}.md" if variant else "latest.md"),
              "w") as f:
        f.write(report)
    with open(os.path.join(a.out, f"results-{tag}.json"), "w") as f:
        json.dump({"meta": meta, "results": results, "memory": mem, "threads": thr}, f,
                  indent=1, default=lambda o: o.tolist() if hasattr(o, "tolist") else str(o))
    with open(os.path.join(a.out, f"log-{tag}.txt"), "w") as f:
        f.write("\n".join(log_lines) + "\n")
    print(f"written: {os.path.join(a.out, f'results-{tag}.md')} (+ .json, log)")


if __name__ == "__main__":
    main()
