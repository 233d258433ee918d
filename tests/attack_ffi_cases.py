"""Hostile calls into the compiled module blocksur._core (a helper script, not tests).

Run as ``python attack_ffi_cases.py [first_case_index]``: for every case it prints
``START <index> <name>`` before the call and ``RESULT <index> <name> <outcome> <module.Type>``
after it, flushing each line, so that the parent (test_attack_ffi.py) can tell which call took
the interpreter down if one does, and go on from the next case in a new process.

Outcomes: ``ok`` (returned), ``raised`` (a Python exception). The parent decides which outcomes
are acceptable; a ``pyo3_runtime.PanicException`` never is.
"""

from __future__ import annotations

import sys

import numpy as np

from blocksur import _core

rng = np.random.default_rng(6)
T = 20
Y = rng.standard_normal(T)
Y2 = rng.standard_normal(T)
X2 = np.column_stack([np.ones(T), rng.standard_normal(T)])
X3 = np.column_stack([np.ones(T), rng.standard_normal((T, 2))])
NAMES = ["a", "b"]
REGS = [["x0", "x1"], ["x0", "x1", "x2"]]


def good_prepared():
    return _core.prepare([Y, Y2], [X2, X3], NAMES, REGS)


def good_estimate(prep=None, method="fgls"):
    prep = prep or good_prepared()
    return prep.estimate(method, "ml", 1e-10, 100)


def pass1():
    return _core.pass1_chunk([Y, Y2], [X2, X3], NAMES, REGS)


def pass2(f=None):
    return _core.pass2_chunk([Y, Y2], [X2, X3], f or pass1())


# name -> (callable, expectation); expectation "raise": must raise an ordinary Python exception;
# "any": may return or raise, but never panic or crash.
CASES: dict = {}


def case(name, expect="raise"):
    def deco(fn):
        CASES[name] = (fn, expect)
        return fn

    return deco


# -- prepare -----------------------------------------------------------------------------------
for label, ys, xs, names, regs in [
    ("prepare: None everywhere", None, None, None, None),
    ("prepare: empty lists", [], [], [], []),
    ("prepare: one y, two X", [Y], [X2, X3], NAMES, REGS),
    ("prepare: names short", [Y, Y2], [X2, X3], ["a"], REGS),
    ("prepare: regressor lists short", [Y, Y2], [X2, X3], NAMES, [["x0", "x1"]]),
    ("prepare: regressor names short", [Y, Y2], [X2, X3], NAMES, [["x0"], ["x0", "x1", "x2"]]),
    ("prepare: regressor names long", [Y, Y2], [X2, X3], NAMES, [["x0", "x1", "x2"], ["x0", "x1", "x2"]]),
    ("prepare: int arrays", [np.arange(T), np.arange(T)], [X2.astype(int), X3.astype(int)], NAMES, REGS),
    ("prepare: float32 arrays", [Y.astype(np.float32)], [X2.astype(np.float32)], ["a"], [["x0", "x1"]]),
    ("prepare: object arrays", [Y.astype(object)], [X2.astype(object)], ["a"], [["x0", "x1"]]),
    ("prepare: complex arrays", [Y.astype(complex)], [X2.astype(complex)], ["a"], [["x0", "x1"]]),
    ("prepare: 3-D X", [Y], [np.zeros((T, 2, 2))], ["a"], [["x0", "x1"]]),
    ("prepare: 2-D y", [X2], [X2], ["a"], [["x0", "x1"]]),
    ("prepare: 0-D y", [np.float64(1.0)], [X2], ["a"], [["x0", "x1"]]),
    ("prepare: 1-D X", [Y], [Y], ["a"], [["x0"]]),
    ("prepare: y shorter than X", [Y[:5]], [X2], ["a"], [["x0", "x1"]]),
    ("prepare: X shorter than y", [Y], [X2[:5]], ["a"], [["x0", "x1"]]),
    ("prepare: equations of different lengths", [Y, Y2[:10]], [X2, X3[:10]], NAMES, REGS),
    ("prepare: zero rows", [np.zeros(0)], [np.zeros((0, 2))], ["a"], [["x0", "x1"]]),
    ("prepare: zero columns", [Y], [np.zeros((T, 0))], ["a"], [[]]),
    ("prepare: T == K", [Y[:2]], [X2[:2]], ["a"], [["x0", "x1"]]),
    ("prepare: duplicate equation names", [Y, Y2], [X2, X3], ["a", "a"], REGS),
    ("prepare: duplicate regressor names", [Y], [X2], ["a"], [["x0", "x0"]]),
    ("prepare: NaN in y", [np.r_[Y[:-1], np.nan]], [X2], ["a"], [["x0", "x1"]]),
    ("prepare: inf in X", [Y], [np.where(np.arange(2 * T).reshape(T, 2) == 7, np.inf, X2)], ["a"], [["x0", "x1"]]),
    ("prepare: all-zero X", [Y], [np.zeros((T, 2))], ["a"], [["x0", "x1"]]),
    ("prepare: strings for arrays", ["abc"], ["def"], ["a"], [["x0"]]),
    ("prepare: str for the list", "abc", [X2], ["a"], [["x0", "x1"]]),
    ("prepare: names not strings", [Y], [X2], [1], [["x0", "x1"]]),
    ("prepare: regressors not lists", [Y], [X2], ["a"], ["x0"]),
    ("prepare: None inside the list", [None], [X2], ["a"], [["x0", "x1"]]),
    ("prepare: dict for the list", {"a": Y}, [X2], ["a"], [["x0", "x1"]]),
]:
    CASES[label] = ((lambda ys=ys, xs=xs, names=names, regs=regs: _core.prepare(ys, xs, names, regs)), "raise")

for label, ys, xs in [
    ("prepare: negative strides", [Y[::-1]], [X2[::-1, ::-1]]),
    ("prepare: zero strides (broadcast)", [np.broadcast_to(1.5, (T,))], [np.broadcast_to(np.arange(1.0, 3.0), (T, 2))]),
    ("prepare: Fortran order", [Y], [np.asfortranarray(X2)]),
    ("prepare: strided view", [np.repeat(Y, 2)[::2]], [np.repeat(X2, 2, axis=0)[::2]]),
    ("prepare: read-only arrays", [np.frombuffer(Y.tobytes())], [X2]),
]:
    CASES[label] = ((lambda ys=ys, xs=xs: _core.prepare(ys, xs, ["a"], [["x0", "x1"]])), "any")

case("prepare: matrix_free with bad data")(lambda: _core.prepare([Y], [X2[:5]], ["a"], [["x0", "x1"]], matrix_free=True))
case("prepare: matrix_free not a bool")(lambda: _core.prepare([Y], [X2], ["a"], [["x0", "x1"]], matrix_free="yes"))
case("prepare: huge T, zero-width X")(lambda: _core.prepare([np.zeros(10**6)], [np.zeros((10**6, 0))], ["a"], [[]]))

# -- residuals ---------------------------------------------------------------------------------
case("residuals: X with fewer rows than y")(lambda: _core.residuals([Y], [X2[:5]], np.zeros(2)))
case("residuals: y with fewer rows than X")(lambda: _core.residuals([Y[:5]], [X2], np.zeros(2)))
case("residuals: equations of different lengths")(lambda: _core.residuals([Y, Y2[:5]], [X2, X3[:5]], np.zeros(5)))
case("residuals: too few coefficients")(lambda: _core.residuals([Y], [X2], np.zeros(1)))
case("residuals: too many coefficients")(lambda: _core.residuals([Y], [X2], np.zeros(9)))
case("residuals: 2-D coef")(lambda: _core.residuals([Y], [X2], np.zeros((2, 1))))
case("residuals: int coef")(lambda: _core.residuals([Y], [X2], np.zeros(2, dtype=int)))
case("residuals: empty")(lambda: _core.residuals([], [], np.zeros(0)))
case("residuals: lists of different lengths")(lambda: _core.residuals([Y, Y2], [X2], np.zeros(2)))
case("residuals: None coef")(lambda: _core.residuals([Y], [X2], None))
case("residuals: zero-column X", "any")(lambda: _core.residuals([Y], [np.zeros((T, 0))], np.zeros(0)))

# -- Prepared.estimate -------------------------------------------------------------------------
P = good_prepared()
case("estimate: unknown method")(lambda: P.estimate("gmm", "ml", 1e-10, 10))
case("estimate: unknown divisor")(lambda: P.estimate("fgls", "median", 1e-10, 10))
case("estimate: NaN tol")(lambda: P.estimate("ifgls", "ml", float("nan"), 10))
case("estimate: negative tol")(lambda: P.estimate("ifgls", "ml", -1.0, 10))
case("estimate: inf tol")(lambda: P.estimate("ifgls", "ml", float("inf"), 10))
case("estimate: max_iter 0")(lambda: P.estimate("ifgls", "ml", 1e-10, 0))
case("estimate: max_iter negative")(lambda: P.estimate("ifgls", "ml", 1e-10, -1))
case("estimate: max_iter 2**64")(lambda: P.estimate("ifgls", "ml", 1e-10, 2**64))
case("estimate: max_iter float")(lambda: P.estimate("ifgls", "ml", 1e-10, 3.5))
case("estimate: method None")(lambda: P.estimate(None, "ml", 1e-10, 10))
case("estimate: r without q")(lambda: P.estimate("fgls", "ml", 1e-10, 10, np.ones((1, 5))))
case("estimate: R with wrong width")(lambda: P.estimate("fgls", "ml", 1e-10, 10, np.ones((1, 3)), np.zeros(1)))
case("estimate: q with wrong length")(lambda: P.estimate("fgls", "ml", 1e-10, 10, np.ones((1, 5)), np.zeros(3)))
case("estimate: R with zero rows")(lambda: P.estimate("fgls", "ml", 1e-10, 10, np.ones((0, 5)), np.zeros(0)))
case("estimate: R as many rows as coefficients")(lambda: P.estimate("fgls", "ml", 1e-10, 10, np.eye(5), np.zeros(5)))
case("estimate: R 1-D")(lambda: P.estimate("fgls", "ml", 1e-10, 10, np.ones(5), np.zeros(1)))
case("estimate: R int")(lambda: P.estimate("fgls", "ml", 1e-10, 10, np.ones((1, 5), dtype=int), np.zeros(1)))
case("estimate: R NaN")(lambda: P.estimate("fgls", "ml", 1e-10, 10, np.full((1, 5), np.nan), np.zeros(1)))
case("estimate: R zero row")(lambda: P.estimate("fgls", "ml", 1e-10, 10, np.zeros((1, 5)), np.zeros(1)))
case("estimate: R duplicate rows")(lambda: P.estimate("fgls", "ml", 1e-10, 10, np.ones((2, 5)), np.zeros(2)))
case("estimate: R inconsistent rows")(lambda: P.estimate("fgls", "ml", 1e-10, 10, np.ones((2, 5)), np.arange(2.0)))
case("estimate: data of another shape (ys/xs)")(
    lambda: P.estimate("fgls", "lw-diagonal", 1e-10, 10, None, None, [Y[:5], Y2[:5]], [X2[:5], X3[:5]])
)
case("estimate: data with other K (ys/xs)")(
    lambda: P.estimate("fgls", "lw-diagonal", 1e-10, 10, None, None, [Y, Y2], [X2, X2])
)
case("estimate: data with short X rows (ys/xs)")(
    lambda: P.estimate("fgls", "lw-diagonal", 1e-10, 10, None, None, [Y, Y2], [X2[:5], X3])
)
case("estimate: ys without xs")(lambda: P.estimate("fgls", "lw-diagonal", 1e-10, 10, None, None, [Y, Y2], None))
case("estimate: one equation of data")(lambda: P.estimate("fgls", "lw-diagonal", 1e-10, 10, None, None, [Y], [X2]))
case("estimate: negative cg_tol")(lambda: P.estimate("fgls", "ml", 1e-10, 10, cg_tol=-1.0))
case("estimate: NaN cg_tol", "any")(lambda: P.estimate("fgls", "ml", 1e-10, 10, cg_tol=float("nan")))
case("estimate: cg_max_iter 0", "any")(lambda: P.estimate("fgls", "ml", 1e-10, 10, cg_max_iter=0))

# -- Prepared.coef_covariance ------------------------------------------------------------------
E = good_estimate(P)
EO = good_estimate(P, "ols")
case("coef_covariance: unknown kind")(lambda: P.coef_covariance(E, "hc9"))
case("coef_covariance: None estimate")(lambda: P.coef_covariance(None))
case("coef_covariance: estimate of another system", "any")(
    lambda: P.coef_covariance(_core.prepare([Y], [X2], ["a"], [["x0", "x1"]]).estimate("ols", "ml", 1e-10, 1))
)
case("coef_covariance: robust without data")(lambda: P.coef_covariance(E, "hc0"))
case("coef_covariance: data with other K")(lambda: P.coef_covariance(E, "hc0", [Y, Y2], [X2, X2]))
case("coef_covariance: data with other K (OLS)")(lambda: P.coef_covariance(EO, "hc1", [Y, Y2], [X3, X3]))
case("coef_covariance: X rows short")(lambda: P.coef_covariance(E, "hc0", [Y, Y2], [X2[:5], X3]))
case("coef_covariance: y rows short")(lambda: P.coef_covariance(E, "hc0", [Y[:5], Y2], [X2, X3]))
case("coef_covariance: data of another T")(lambda: P.coef_covariance(E, "hc0", [Y[:5], Y2[:5]], [X2[:5], X3[:5]]))
case("coef_covariance: one equation of data")(lambda: P.coef_covariance(E, "hc0", [Y], [X2]))
case("coef_covariance: ys without xs")(lambda: P.coef_covariance(E, "hc0", [Y, Y2], None))
case("coef_covariance: NaN in data")(lambda: P.coef_covariance(E, "hc0", [np.r_[Y[:-1], np.nan], Y2], [X2, X3]))
case("coef_covariance: int data")(lambda: P.coef_covariance(E, "hc0", [np.arange(T), np.arange(T)], [X2, X3]))
case("coef_standard_errors: unknown kind")(lambda: P.coef_standard_errors(E, "hc9"))
case("coef_standard_errors: None estimate")(lambda: P.coef_standard_errors(None))
case("coef_standard_errors: estimate of another system", "any")(
    lambda: P.coef_standard_errors(_core.prepare([Y], [X2], ["a"], [["x0", "x1"]]).estimate("ols", "ml", 1e-10, 1))
)
case("coef_standard_errors: estimate of another system, same K", "any")(
    lambda: P.coef_standard_errors(
        _core.prepare([Y, Y2], [X3, X2], NAMES, [REGS[1], REGS[0]]).estimate("fgls", "ml", 1e-10, 1)
    )
)
for _m in ("ols", "fgls"):
    # a restricted estimate of a smaller system: had panicked (ols) or returned 2 values (fgls)
    case(f"coef_standard_errors: restricted {_m} estimate of another system")(
        lambda m=_m: P.coef_standard_errors(
            _core.prepare([Y], [X2], ["a"], [["x0", "x1"]]).estimate(
                m, "ml", 1e-10, 10, np.array([[0.0, 1.0]]), np.array([0.5])
            )
        )
    )
case("coef_standard_errors: robust without data")(lambda: P.coef_standard_errors(E, "hc0"))
case("coef_standard_errors: data with other K")(lambda: P.coef_standard_errors(E, "hc0", [Y, Y2], [X2, X2]))
case("coef_standard_errors: X rows short")(lambda: P.coef_standard_errors(E, "hc1", [Y, Y2], [X2[:5], X3]))
case("coef_standard_errors: NaN in data")(
    lambda: P.coef_standard_errors(EO, "hc0", [np.r_[Y[:-1], np.nan], Y2], [X2, X3])
)
case("coef_standard_errors: matrix-free path")(
    lambda: _core.prepare([Y, Y2], [X2, X3], NAMES, REGS, matrix_free=True).coef_standard_errors(
        _core.prepare([Y, Y2], [X2, X3], NAMES, REGS, matrix_free=True).estimate("fgls", "ml", 1e-10, 10)
    )
)
case("log_likelihood: None")(lambda: P.log_likelihood(None))
case("log_likelihood: estimate of another system", "any")(
    lambda: P.log_likelihood(_core.prepare([Y], [X2], ["a"], [["x0", "x1"]]).estimate("ols", "ml", 1e-10, 1))
)
case("cg_standard_errors: equation index out of range")(
    lambda: _core.prepare([Y, Y2], [X2, X3], NAMES, REGS, matrix_free=True).cg_standard_errors(
        _core.prepare([Y, Y2], [X2, X3], NAMES, REGS, matrix_free=True).estimate("fgls", "ml", 1e-10, 10), [5]
    )
)
case("cg_standard_errors: negative index")(lambda: P.cg_standard_errors(E, [-1]))
case("cg_standard_errors: on the direct path", "any")(lambda: P.cg_standard_errors(E, [0]))
case("cg_standard_errors: estimate of another system", "any")(
    lambda: _core.prepare([Y, Y2], [X2, X3], NAMES, REGS, matrix_free=True).cg_standard_errors(
        _core.prepare([Y], [X2], ["a"], [["x0", "x1"]]).estimate("ols", "ml", 1e-10, 1), [0]
    )
)
case("Prepared(): direct construction")(lambda: _core.Prepared())
case("Estimate(): direct construction")(lambda: _core.Estimate())

# -- chunked passes ----------------------------------------------------------------------------
case("pass1_chunk: X rows short")(lambda: _core.pass1_chunk([Y], [X2[:5]], ["a"], [["x0", "x1"]]))
case("pass1_chunk: zero rows", "any")(lambda: _core.pass1_chunk([np.zeros(0)], [np.zeros((0, 2))], ["a"], [["x0", "x1"]]))
case("pass1_chunk: zero columns")(lambda: _core.pass1_chunk([Y], [np.zeros((T, 0))], ["a"], [[]]))
case("pass1_chunk: NaN")(lambda: _core.pass1_chunk([np.r_[np.nan, Y[1:]]], [X2], ["a"], [["x0", "x1"]]))
case("pass1_chunk: huge row_offset", "any")(lambda: _core.pass1_chunk([Y], [X2], ["a"], [["x0", "x1"]], row_offset=2**63))
case("pass1_chunk: negative row_offset")(lambda: _core.pass1_chunk([Y], [X2], ["a"], [["x0", "x1"]], row_offset=-1))
case("pass1_merge: different systems")(lambda: _core.pass1_merge(pass1(), (T, [X2.T @ X2], [1.0])))
case("pass1_merge: non-square factors", "any")(lambda: _core.pass1_merge((T, [np.ones((3, 2))], [1.0]), (T, [np.ones((3, 2))], [1.0])))
case("pass1_merge: empty factors", "any")(lambda: _core.pass1_merge((0, [], []), (0, [], [])))
case("pass1_merge: 0x0 factors", "any")(lambda: _core.pass1_merge((0, [np.zeros((0, 0))], [0.0]), (0, [np.zeros((0, 0))], [0.0])))
case("pass1_merge: n_rows overflow", "any")(lambda: _core.pass1_merge((2**64 - 1, [np.eye(2)], [1.0]), (5, [np.eye(2)], [1.0])))
case("pass1_merge: None")(lambda: _core.pass1_merge(None, None))
case("pass1_merge: int factors")(lambda: _core.pass1_merge((T, [np.eye(2, dtype=int)], [1.0]), (T, [np.eye(2, dtype=int)], [1.0])))
case("pass1_merge: y_max of another length")(lambda: _core.pass1_merge(pass1(), (*pass1()[:2], [1.0])))
case("pass1_merge: old two-field factors")(lambda: _core.pass1_merge(pass1()[:2], pass1()[:2]))
case("pass1_check: good", "any")(lambda: _core.pass1_check(NAMES, pass1()))
case("pass1_check: out of range")(lambda: _core.pass1_check(NAMES, (*pass1()[:2], [1.0, 1e-300])))
case("pass1_check: names of another length")(lambda: _core.pass1_check(NAMES[:1], pass1()))
case("pass1_check: NaN y_max", "any")(lambda: _core.pass1_check(NAMES, (*pass1()[:2], [np.nan, 1.0])))
case("pass2_chunk: factors of another system")(lambda: _core.pass2_chunk([Y], [X2], (T, [np.eye(4)], [1.0])))
case("pass2_chunk: 0x0 factor")(lambda: _core.pass2_chunk([Y], [X2], (T, [np.zeros((0, 0))], [1.0])))
case("pass2_chunk: non-square factor")(lambda: _core.pass2_chunk([Y], [X2], (T, [np.ones((3, 2))], [1.0])))
case("pass2_chunk: singular factor", "any")(lambda: _core.pass2_chunk([Y], [X2], (T, [np.zeros((3, 3))], [1.0])))
case("pass2_chunk: too few factors")(lambda: _core.pass2_chunk([Y, Y2], [X2, X3], (T, [np.eye(3)], [1.0])))
case("pass2_chunk: NaN factor", "any")(lambda: _core.pass2_chunk([Y], [X2], (T, [np.full((3, 3), np.nan)], [1.0])))
case("pass2_merge: different sizes")(lambda: _core.pass2_merge(pass2(), _core.pass2_chunk([Y], [X2], _core.pass1_chunk([Y], [X2], ["a"], [["x0", "x1"]]))))
case("pass2_merge: missing keys")(lambda: _core.pass2_merge({}, {}))
case("pass2_merge: y lists of different lengths")(lambda: _core.pass2_merge(pass2(), {**pass2(), "y_mean": [0.0]}))
case("pass2_merge: colsum of another length")(lambda: _core.pass2_merge(pass2(), {**pass2(), "colsum": np.zeros(2)}))
case("pass2_merge: gram not square")(lambda: _core.pass2_merge({**pass2(), "gram": np.zeros((7, 3))}, {**pass2(), "gram": np.zeros((7, 3))}))
case("pass2_merge: wrong value types")(lambda: _core.pass2_merge({**pass2(), "n_rows": "x"}, pass2()))
case("prepare_from_summaries: good", "any")(lambda: _core.prepare_from_summaries(NAMES, REGS, pass1(), pass2()))
case("prepare_from_summaries: empty")(lambda: _core.prepare_from_summaries([], [], (0, [], []), {**pass2(), "n_rows": 0}))
case("prepare_from_summaries: gram too small")(lambda: _core.prepare_from_summaries(NAMES, REGS, pass1(), {**pass2(), "gram": np.eye(2)}))
case("prepare_from_summaries: colsum too short")(lambda: _core.prepare_from_summaries(NAMES, REGS, pass1(), {**pass2(), "colsum": np.zeros(1)}))
case("prepare_from_summaries: y stats too short")(lambda: _core.prepare_from_summaries(NAMES, REGS, pass1(), {**pass2(), "y_m2": [1.0], "y_raw": [1.0]}))
case("prepare_from_summaries: y_max too short")(lambda: _core.prepare_from_summaries(NAMES, REGS, pass1(), {**pass2(), "y_max": [1.0]}))
case("prepare_from_summaries: y_max out of range")(lambda: _core.prepare_from_summaries(NAMES, REGS, pass1(), {**pass2(), "y_max": [1e-200, 1.0]}))
case("prepare_from_summaries: factor not square")(lambda: _core.prepare_from_summaries(["a"], [["x0", "x1"]], (T, [np.ones((3, 1))], [1.0]), {**_core.pass2_chunk([Y], [X2], _core.pass1_chunk([Y], [X2], ["a"], [["x0", "x1"]]))}))
case("prepare_from_summaries: names vs factors")(lambda: _core.prepare_from_summaries(["a"], [["x0", "x1"]], pass1(), pass2()))
case("prepare_from_summaries: n_rows mismatch")(lambda: _core.prepare_from_summaries(NAMES, REGS, pass1(), {**pass2(), "n_rows": 3}))
case("prepare_from_summaries: zero factors", "any")(lambda: _core.prepare_from_summaries(NAMES, REGS, (T, [np.zeros((3, 3)), np.zeros((4, 4))], [1.0, 1.0]), pass2()))

# -- row_chunk / row_merge / row_finish (one-pass summaries) -------------------------------------
def rows():
    return _core.row_chunk([Y, Y2], [X2, X3], NAMES, REGS)


case("row_chunk: good", "any")(rows)
case("row_chunk: one y, two X")(lambda: _core.row_chunk([Y], [X2, X3], NAMES, REGS))
case("row_chunk: NaN")(lambda: _core.row_chunk([np.r_[np.nan, Y[1:]], Y2], [X2, X3], NAMES, REGS))
case("row_chunk: rows differ")(lambda: _core.row_chunk([Y, Y2[:5]], [X2, X3], NAMES, REGS))
case("row_merge: good", "any")(lambda: _core.row_merge(rows(), rows()))
case("row_merge: other system")(lambda: _core.row_merge(rows(), _core.row_chunk([Y], [X2], ["a"], [["x0", "x1"]])))
case("row_merge: missing keys")(lambda: _core.row_merge({}, rows()))
case("row_merge: y lists of other lengths")(lambda: _core.row_merge(rows(), {**rows(), "y_m2": [1.0]}))
case("row_finish: good", "any")(lambda: _core.row_finish(rows(), [3, 4], NAMES))
case("row_finish: widths do not add up")(lambda: _core.row_finish(rows(), [3, 3], NAMES))
case("row_finish: a zero width")(lambda: _core.row_finish(rows(), [0, 7], NAMES))
case("row_finish: no widths")(lambda: _core.row_finish(rows(), [], []))
case("row_finish: NaN in r")(lambda: _core.row_finish({**rows(), "r": np.full((7, 7), np.nan)}, [3, 4], NAMES))
case("row_finish: colsum short")(lambda: _core.row_finish({**rows(), "colsum": np.zeros(2)}, [3, 4], NAMES))
case("row_finish: wrong types")(lambda: _core.row_finish({**rows(), "n_rows": "x"}, [3, 4], NAMES))
case("row_finish: names of another length")(lambda: _core.row_finish(rows(), [3, 4], NAMES[:1]))
case("row_finish: y_max short")(lambda: _core.row_finish({**rows(), "y_max": [1.0]}, [3, 4], NAMES))
case("row_finish: y_max out of range")(lambda: _core.row_finish({**rows(), "y_max": [1.0, 1e200]}, [3, 4], NAMES))
case("row_finish: NaN y_max", "any")(lambda: _core.row_finish({**rows(), "y_max": [np.nan, 1.0]}, [3, 4], NAMES))

# -- fit_many (one array per equation, systems' rows stacked, system g = rows bounds[g]:bounds[g+1])
FM = ([Y, Y2], [X2, X3])
case("fit_many: empty", "any")(lambda: _core.fit_many([], [], [0], "fgls", "ml", 1e-10, 10, 2))
case("fit_many: no bounds")(lambda: _core.fit_many(*FM, [], "fgls", "ml", 1e-10, 10, 2))
case("fit_many: decreasing bounds")(lambda: _core.fit_many(*FM, [0, 15, 10], "fgls", "ml", 1e-10, 10, 2))
case("fit_many: bounds past the rows")(lambda: _core.fit_many(*FM, [0, T + 1], "fgls", "ml", 1e-10, 10, 2))
case("fit_many: negative bound")(lambda: _core.fit_many(*FM, [-1, T], "fgls", "ml", 1e-10, 10, 2))
case("fit_many: lists of different lengths")(lambda: _core.fit_many([Y, Y2], [X2], [0, T], "fgls", "ml", 1e-10, 10, 2))
case("fit_many: y lengths differ")(lambda: _core.fit_many([Y, Y2[:5]], [X2, X3], [0, 5], "fgls", "ml", 1e-10, 10, 2))
# -- set_threads / get_threads / build_info ----------------------------------------------------
_threads_now = _core.get_threads()
case("set_threads: 0")(lambda: _core.set_threads(0))
case("set_threads: negative")(lambda: _core.set_threads(-1))
case("set_threads: 2**70")(lambda: _core.set_threads(2**70))
case("set_threads: 1025")(lambda: _core.set_threads(1025))
case("set_threads: a string")(lambda: _core.set_threads("2"))
case("set_threads: a float")(lambda: _core.set_threads(2.5))
case("set_threads: back to the start", "any")(lambda: _core.set_threads(_threads_now))
case("get_threads: an argument")(lambda: _core.get_threads(1))
case("build_info: an argument")(lambda: _core.build_info(1))


def recorded(result):
    """fit_many reports per-system failures in result["errors"]; turn the first into a raise."""
    for entry in result["errors"]:
        if entry is not None:
            raise ValueError(f"recorded: {entry[0]}: {entry[1]}")
    return result


case("fit_many: X rows short")(lambda: _core.fit_many([Y, Y2], [X2[:5], X3], [0, T], "fgls", "ml", 1e-10, 10, 2))
case("fit_many: two systems", "any")(lambda: recorded(_core.fit_many(*FM, [0, T // 2, T], "fgls", "ml", 1e-10, 10, 2)))
case("fit_many: an empty system")(lambda: recorded(_core.fit_many(*FM, [0, 0, T], "fgls", "ml", 1e-10, 10, 2)))
case("fit_many: zero threads", "any")(lambda: _core.fit_many(*FM, [0, T], "fgls", "ml", 1e-10, 10, 0))
case("fit_many: 10**6 threads", "any")(lambda: _core.fit_many(*FM, [0, T], "fgls", "ml", 1e-10, 10, 10**6))
case("fit_many: bad method")(lambda: _core.fit_many(*FM, [0, T], "gmm", "ml", 1e-10, 10, 2))
case("fit_many: NaN data")(lambda: recorded(_core.fit_many([np.r_[np.nan, Y[1:]], Y2], [X2, X3], [0, T], "fgls", "ml", 1e-10, 10, 2)))
case("fit_many: collinear system")(lambda: recorded(_core.fit_many([Y, Y2], [np.column_stack([X2, X2[:, 1]]), X3], [0, T], "fgls", "ml", 1e-10, 10, 2)))
case("fit_many: equation-less systems", "any")(lambda: _core.fit_many([], [], [0, 0, 0], "fgls", "ml", 1e-10, 10, 2))
case("fit_many: int data")(lambda: _core.fit_many([np.arange(T), np.arange(T)], [X2, X3], [0, T], "fgls", "ml", 1e-10, 10, 2))


def main(first: int) -> None:
    items = list(CASES.items())
    for index in range(first, len(items)):
        name, (fn, _expect) = items[index]
        print(f"START {index} {name}", flush=True)
        try:
            fn()
            outcome, kind = "ok", "-"
        except BaseException as err:  # noqa: BLE001 - PanicException derives from BaseException
            outcome, kind = "raised", f"{type(err).__module__}.{type(err).__name__}"
        print(f"RESULT {index} {name}\t{outcome}\t{kind}", flush=True)
    print("DONE", flush=True)


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 0)
