"""Input validation, error classes and their attributes, warnings, and the
accepted input forms (which must not change any number)."""

import warnings

import numpy as np
import pytest

import blocksur
import blocksur.errors as errors
from reference import make_sur_data, record


def _fit(eqs, regressor_names=None, **kw):
    # An error may be raised when the system is built or when it is fitted.
    return blocksur.EquationSystem(eqs, regressor_names=regressor_names).fit(**kw)


def _base(seed=71, T=30, ks=(3, 4, 2)):
    return {k: (y.copy(), X.copy()) for k, (y, X) in make_sur_data(seed, T=T, ks=ks).items()}


# ---------------------------------------------------------------------------
# The classes


def test_error_hierarchy():
    for name in (
        "BlocksurError", "InputError", "EmptySystemError", "ShapeMismatchError", "NonFiniteError",
        "TooFewObservationsError", "CollinearityError", "SingularOmegaError", "InvalidOptionError",
        "BlocksurWarning", "NotConvergedWarning",
    ):
        assert getattr(blocksur, name) is getattr(errors, name), name
    assert issubclass(errors.BlocksurError, Exception)
    assert issubclass(errors.InputError, errors.BlocksurError) and issubclass(errors.InputError, ValueError)
    for sub in (errors.EmptySystemError, errors.ShapeMismatchError, errors.NonFiniteError,
                errors.TooFewObservationsError, errors.CollinearityError):
        assert issubclass(sub, errors.InputError), sub
    assert issubclass(errors.SingularOmegaError, errors.BlocksurError)
    assert issubclass(errors.SingularOmegaError, ValueError)
    assert not issubclass(errors.SingularOmegaError, errors.InputError)
    assert issubclass(errors.InvalidOptionError, errors.BlocksurError)
    assert issubclass(errors.InvalidOptionError, ValueError)
    assert issubclass(errors.BlocksurWarning, UserWarning)
    assert issubclass(errors.NotConvergedWarning, errors.BlocksurWarning)


# ---------------------------------------------------------------------------
# Non-finite values


@pytest.mark.parametrize("bad", [np.nan, np.inf, -np.inf])
def test_nonfinite_in_y(bad):
    eqs = _base()
    eqs["b"][0][7] = bad
    with pytest.raises(errors.NonFiniteError) as ei:
        _fit(eqs)
    e = ei.value
    assert isinstance(e, errors.InputError) and isinstance(e, ValueError)
    assert e.equation == "b"
    assert e.row == 7
    assert e.column is None


@pytest.mark.parametrize("bad", [np.inf, -np.inf, np.nan])
def test_nonfinite_in_X(bad):
    eqs = _base()
    eqs["a"][1][12, 1] = bad
    with pytest.raises(errors.NonFiniteError) as ei:
        _fit(eqs)
    e = ei.value
    assert (e.equation, e.row, e.column) == ("a", 12, "x1")


def test_nonfinite_in_X_uses_regressor_names():
    eqs = _base()
    eqs["c"][1][4, 1] = np.inf
    names = {"a": ["const", "p", "q"], "b": ["const", "r", "s", "t"], "c": ["const", "income"]}
    with pytest.raises(errors.NonFiniteError) as ei:
        _fit(eqs, regressor_names=names)
    assert (ei.value.equation, ei.value.row, ei.value.column) == ("c", 4, "income")


# ---------------------------------------------------------------------------
# Shapes


def test_lengths_differ_across_equations():
    eqs = _base()
    y, X = eqs["b"]
    eqs["b"] = (y[:-3], X[:-3])
    with pytest.raises(errors.ShapeMismatchError) as ei:
        _fit(eqs)
    # The first equation fixes T (common practice), so "b" is the odd one.
    assert ei.value.equation == "b"
    assert isinstance(ei.value, errors.InputError)


def test_lengths_differ_within_equation():
    eqs = _base()
    y, X = eqs["c"]
    eqs["c"] = (y, X[:-1])
    with pytest.raises(errors.ShapeMismatchError) as ei:
        _fit(eqs)
    assert ei.value.equation == "c"


@pytest.mark.parametrize("extra", [0, 2])
def test_too_few_observations(extra):
    # T <= K_i: no residual degrees of freedom. T == K (extra=0) and T < K.
    eqs = _base(T=6)
    rng = np.random.default_rng(5)
    X = rng.standard_normal((6, 6 + extra))
    eqs["b"] = (rng.standard_normal(6), X)
    with pytest.raises(errors.TooFewObservationsError) as ei:
        _fit(eqs)
    assert ei.value.equation == "b"
    assert isinstance(ei.value, errors.InputError)


# ---------------------------------------------------------------------------
# Rank


def test_collinear_column():
    eqs = _base()
    rng = np.random.default_rng(8)
    T = 30
    X = np.column_stack([np.ones(T), rng.standard_normal(T) * 3 + 1, np.zeros(T), rng.standard_normal(T)])
    X[:, 2] = X[:, 0] + X[:, 1]  # x2 = x0 + x1
    eqs["b"] = (rng.standard_normal(T), X)
    with pytest.raises(errors.CollinearityError) as ei:
        _fit(eqs)
    assert ei.value.equation == "b"
    assert ei.value.column == "x2"
    assert isinstance(ei.value, errors.InputError)
    # With names, the name is reported.
    names = {"a": ["c", "p", "q"], "b": ["one", "u", "u_plus_one", "w"], "c": ["c", "v"]}
    with pytest.raises(errors.CollinearityError) as ei:
        _fit(eqs, regressor_names=names)
    assert (ei.value.equation, ei.value.column) == ("b", "u_plus_one")


def test_all_zero_column():
    eqs = _base()
    eqs["c"][1][:, 1] = 0.0
    with pytest.raises(errors.CollinearityError) as ei:
        _fit(eqs)
    assert (ei.value.equation, ei.value.column) == ("c", "x1")


def _budget_shares(extra=False):
    # Three shares that add to 1 in every period, identical regressors with a
    # constant: OLS residuals add to zero across the three equations, so
    # Omega is singular (the classic adding-up case of demand systems).
    rng = np.random.default_rng(9)
    T = 40
    X = np.column_stack([np.ones(T), rng.standard_normal(T), rng.standard_normal(T)])
    s1 = 0.3 + 0.05 * X[:, 1] + 0.02 * rng.standard_normal(T)
    s2 = 0.5 - 0.03 * X[:, 2] + 0.02 * rng.standard_normal(T)
    s3 = 1.0 - s1 - s2
    eqs = {"s1": (s1, X), "s2": (s2, X.copy()), "s3": (s3, X.copy())}
    if extra:
        eqs["z"] = (X @ [1.0, 2.0, -1.0] + rng.standard_normal(T), X.copy())
    return eqs


@pytest.mark.parametrize("method", ["fgls", "ifgls"])
@pytest.mark.parametrize("divisor", ["ml", "dof"])
def test_budget_shares_singular_omega(method, divisor):
    eqs = _budget_shares()
    with pytest.raises(errors.SingularOmegaError) as ei:
        _fit(eqs, method=method, omega=divisor)
    e = ei.value
    assert isinstance(e, ValueError) and isinstance(e, errors.BlocksurError)
    assert sorted(e.equations) == ["s1", "s2", "s3"]
    assert "drop" in str(e).lower()


def test_budget_shares_singular_omega_names_only_involved():
    # An unrelated fourth equation is not part of the dependency.
    eqs = _budget_shares(extra=True)
    with pytest.raises(errors.SingularOmegaError) as ei:
        _fit(eqs, method="fgls")
    assert sorted(ei.value.equations) == ["s1", "s2", "s3"]


# ---------------------------------------------------------------------------
# Empty system, options


@pytest.mark.parametrize("empty", [{}, []])
def test_empty_system(empty):
    with pytest.raises(errors.EmptySystemError) as ei:
        _fit(empty)
    assert isinstance(ei.value, errors.InputError)


@pytest.mark.parametrize("kw", [{"method": "gls2"}, {"method": "FGLS "}, {"method": ""}, {"omega": "xyz"}, {"omega": "ML2"}])
def test_bad_options(kw):
    sysm = blocksur.EquationSystem(_base())
    with pytest.raises(errors.InvalidOptionError) as ei:
        sysm.fit(**kw)
    assert isinstance(ei.value, ValueError) and isinstance(ei.value, errors.BlocksurError)


# ---------------------------------------------------------------------------
# Non-convergence


def test_not_converged_warns():
    eqs = make_sur_data(72, T=50, ks=(2, 4, 3, 5))
    sysm = blocksur.EquationSystem(eqs)
    with pytest.warns(errors.NotConvergedWarning):
        fit = sysm.fit("ifgls", max_iter=2)
    assert fit.converged is False
    assert fit.n_iter == 2
    assert np.all(np.isfinite(fit.coef.to_numpy()))
    path = np.asarray(fit.criterion_path, dtype=float)
    assert path.size >= 1 and path[-1] > 1e-10
    # The same system converges with the default max_iter, without warning.
    with warnings.catch_warnings():
        warnings.simplefilter("error", errors.BlocksurWarning)
        ok = sysm.fit("ifgls")
    assert ok.converged is True and ok.n_iter > 2


# ---------------------------------------------------------------------------
# Input forms: the same numbers as float64 C-ordered arrays.


def _same(f1, f2, label, rtol=1e-12):
    d = 0.0
    for attr in ("coef", "se"):
        a, b = getattr(f1, attr).to_numpy(), getattr(f2, attr).to_numpy()
        d = max(d, float(np.max(np.abs(a - b) / np.maximum(np.abs(b), f2.se.to_numpy()))))
    for attr in ("vcov", "omega", "resid"):
        a, b = getattr(f1, attr).to_numpy(), getattr(f2, attr).to_numpy()
        d = max(d, float(np.max(np.abs(a - b))) / float(np.max(np.abs(b))))
    d = max(d, abs(f1.loglik - f2.loglik) / abs(f2.loglik))
    record(f"input forms: {label} vs float64 C arrays (max rel)", d)
    assert d <= rtol


@pytest.mark.parametrize("method", ["ols", "fgls", "ifgls"])
def test_list_input_names(method):
    eqs = _base()
    f_list = blocksur.EquationSystem(list(eqs.values())).fit(method)
    f_dict = blocksur.EquationSystem({f"eq{i}": v for i, v in enumerate(eqs.values())}).fit(method)
    assert list(f_list.omega.index) == ["eq0", "eq1", "eq2"]
    assert list(f_list.coef.index)[:3] == [("eq0", "x0"), ("eq0", "x1"), ("eq0", "x2")]
    _same(f_list, f_dict, "list input")


def test_integer_dtype():
    rng = np.random.default_rng(10)
    T = 40
    eqs_int = {}
    for i, k in enumerate((3, 2, 4)):
        X = rng.integers(-50, 50, size=(T, k)).astype(np.int64)
        X[:, 0] = 1
        y = X @ rng.integers(-5, 5, size=k) + rng.integers(-20, 20, size=T)
        eqs_int["abc"[i]] = (y.astype(np.int32), X)
    eqs_f = {k: (y.astype(np.float64), X.astype(np.float64)) for k, (y, X) in eqs_int.items()}
    for method in ("ols", "fgls", "ifgls"):
        _same(_fit(eqs_int, method=method), _fit(eqs_f, method=method), "int dtype")


def test_float32():
    eqs = _base()
    eqs32 = {k: (y.astype(np.float32), X.astype(np.float32)) for k, (y, X) in eqs.items()}
    # The float32 values, widened exactly to float64.
    eqs64 = {k: (y.astype(np.float64), X.astype(np.float64)) for k, (y, X) in eqs32.items()}
    for method in ("ols", "fgls", "ifgls"):
        _same(_fit(eqs32, method=method), _fit(eqs64, method=method), "float32")


def test_fortran_order():
    eqs = _base()
    eqsF = {k: (y, np.asfortranarray(X)) for k, (y, X) in eqs.items()}
    assert all(X.flags.f_contiguous and not X.flags.c_contiguous for _, X in eqsF.values())
    for method in ("ols", "fgls", "ifgls"):
        _same(_fit(eqsF, method=method), _fit(eqs, method=method), "Fortran order")


def test_non_contiguous_views():
    big = _base(T=60)
    rng = np.random.default_rng(11)
    views, copies = {}, {}
    for k, (y, X) in big.items():
        # Row stride 2, extra junk columns sliced away, reversed column order.
        wide = np.column_stack([X, rng.standard_normal((60, X.shape[1]))])
        Xv = wide[::2, : X.shape[1]][:, ::-1]
        Y2 = np.column_stack([y, rng.standard_normal(60)])
        yv = Y2[::2, 0]
        assert not Xv.flags.c_contiguous and not Xv.flags.f_contiguous and not yv.flags.c_contiguous
        views[k] = (yv, Xv)
        copies[k] = (np.ascontiguousarray(yv), np.ascontiguousarray(Xv))
    for method in ("ols", "fgls", "ifgls"):
        _same(_fit(views, method=method), _fit(copies, method=method), "non-contiguous views")
    # X[::2] exactly as in the brief.
    v2 = {k: (y[::2], X[::2]) for k, (y, X) in big.items()}
    c2 = {k: (y[::2].copy(), X[::2].copy()) for k, (y, X) in big.items()}
    _same(_fit(v2, method="fgls"), _fit(c2, method="fgls"), "X[::2] views")
