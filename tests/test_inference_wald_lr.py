"""Wald and likelihood-ratio tests against outside references.

References:
* statsmodels' ``wald_test`` (use_f=False: chi2; use_f=True: F) on results of its general
  ``sm.GLS`` / ``sm.OLS`` on the dense stacked design. statsmodels' GLS ``cov_params()`` is
  ``normalized_cov_params * scale`` with scale the whitened residual variance, whereas a SUR
  Wald test takes Omega as known: we therefore fit with ``cov_type="fixed scale",
  cov_kwds={"scale": 1.0}`` (statsmodels' own known-scale covariance), and cross-check by passing
  the covariance explicitly through ``cov_p=`` (statsmodels then uses it as given, no scale);
* the Gaussian log-likelihood formula (textbook, from memory) for LR = 2 (ll_u - ll_r);
* scipy.stats chi2 / f for the p-values.
"""

import numpy as np
import pytest
import statsmodels.api as sm
from scipy import stats

import blocksur
import inference_reference as ir
import reference as ref

KS = (3, 2, 3)


def _data(seed=31, T=30):
    return ref.make_sur_data(seed, T=T, ks=KS)


def _rows(eqs, spec):
    """R, q from a list of ({(eq, reg): weight}, rhs) written by hand."""
    pos = ir.coef_positions(eqs)
    R = np.zeros((len(spec), sum(KS)))
    for i, (terms, _) in enumerate(spec):
        for key, w in terms.items():
            R[i, pos[key]] += w
    return R, np.array([rhs for _, rhs in spec], float)


TEST_TEXT = "a::x1 = b::x1; c::x1 - 2*c::x2 = 0.5; b::x0 = 0"
TEST_SPEC = [
    ({("a", "x1"): 1.0, ("b", "x1"): -1.0}, 0.0),
    ({("c", "x1"): 1.0, ("c", "x2"): -2.0}, 0.5),
    ({("b", "x0"): 1.0}, 0.0),
]


@pytest.mark.parametrize("method", ["fgls", "ifgls"])
def test_wald_unrestricted_gls_vs_statsmodels(method):
    eqs = _data()
    fit = blocksur.EquationSystem(eqs).fit(method, tol=1e-12)
    R, q = _rows(eqs, TEST_SPEC)
    y, Xb, T, _, _ = ir.design(eqs)
    sigma = np.kron(fit.omega.to_numpy(), np.eye(T))
    res = sm.GLS(y, Xb, sigma=sigma).fit(cov_type="fixed scale", cov_kwds={"scale": 1.0})
    # statsmodels wald_test, chi2 form
    sm_chi2 = res.wald_test((R, q), use_f=False, scalar=True)
    w = fit.wald(TEST_TEXT)
    assert (w.dist, w.df, w.df_denom) == ("chi2", 3, None)
    err = ref.record("inference: Wald chi2 vs statsmodels wald_test (rel)",
                     abs(w.statistic - sm_chi2.statistic) / sm_chi2.statistic)
    assert err < 1e-9
    np.testing.assert_allclose(w.pvalue, float(sm_chi2.pvalue), rtol=1e-8)
    # the same with the covariance passed explicitly (cov_p is used as given by statsmodels)
    res_plain = sm.GLS(y, Xb, sigma=sigma).fit()
    alt = res_plain.wald_test((R, q), cov_p=res_plain.normalized_cov_params, use_f=False, scalar=True)
    np.testing.assert_allclose(w.statistic, alt.statistic, rtol=1e-9)
    # and NOT the default scaled covariance (documents why the scale must be removed)
    scaled = res_plain.wald_test((R, q), use_f=False, scalar=True)
    assert abs(scaled.statistic - w.statistic) / w.statistic > 1e-3 or abs(res_plain.scale - 1) < 1e-3
    # F form: W/m ~ F(m, NT - K), statsmodels df_resid of the stacked GLS
    sm_f = res.wald_test((R, q), use_f=True, scalar=True)
    wf = fit.wald(TEST_TEXT, form="F")
    assert (wf.dist, wf.df, wf.df_denom) == ("F", 3, 3 * T - sum(KS))
    assert wf.df_denom == res.df_resid
    np.testing.assert_allclose(wf.statistic, float(np.squeeze(sm_f.fvalue)), rtol=1e-9)
    np.testing.assert_allclose(wf.pvalue, float(sm_f.pvalue), rtol=1e-8)
    # f_test is statsmodels' F-form shortcut: same number
    np.testing.assert_allclose(wf.statistic, float(np.squeeze(res.f_test((R, q)).fvalue)), rtol=1e-9)


def test_wald_ols_fit_uses_sur_covariance_vs_statsmodels():
    # For method="ols" the classical covariance is the cross-equation sandwich
    # (X'X)^-1 X'(Omega kron I)X (X'X)^-1 (textbook stacked OLS); the Wald test of
    # statsmodels' stacked OLS with that covariance passed as cov_p must agree.
    eqs = _data(seed=32)
    fit = blocksur.EquationSystem(eqs).fit("ols", omega="dof")
    R, q = _rows(eqs, TEST_SPEC)
    y, Xb, _, _, _ = ir.design(eqs)
    res = sm.OLS(y, Xb).fit()
    V = ref.dense_ols_cov(eqs, fit.omega.to_numpy())
    sm_w = res.wald_test((R, q), cov_p=V, use_f=False, scalar=True)
    w = fit.wald(TEST_TEXT)
    err = ref.record("inference: Wald chi2 (OLS fit) vs statsmodels wald_test (rel)",
                     abs(w.statistic - sm_w.statistic) / sm_w.statistic)
    assert err < 1e-9
    np.testing.assert_allclose(w.pvalue, float(sm_w.pvalue), rtol=1e-8)


@pytest.mark.parametrize("method", ["fgls", "ifgls"])
def test_wald_after_restricted_fit_vs_statsmodels(method):
    # A fit restricted by a::x1 = b::x1 (rank 1), then a Wald test of two further restrictions.
    # Reference: statsmodels GLS on the substituted design b = J theta + c, where the tested
    # restrictions R2 b = q2 become (R2 J) theta = q2 - R2 c; F denominator df = NT - (K - r).
    eqs = _data(seed=33)
    R1, q1 = _rows(eqs, TEST_SPEC[:1])
    fit = blocksur.EquationSystem(eqs).fit(method, restrictions="a::x1 = b::x1", tol=1e-12)
    assert fit.n_restrictions == 1
    b, V, res, J, c = ir.dense_restricted_gls(eqs, fit.omega.to_numpy(), R1, q1)
    R2, q2 = _rows(eqs, TEST_SPEC[1:])
    text2 = "c::x1 - 2*c::x2 = 0.5; b::x0 = 0"
    sm_w = res.wald_test((R2 @ J, q2 - R2 @ c), cov_p=res.normalized_cov_params, use_f=False, scalar=True)
    w = fit.wald(text2)
    err = ref.record("inference: Wald chi2 after restricted fit vs statsmodels (rel)",
                     abs(w.statistic - sm_w.statistic) / sm_w.statistic)
    assert err < 1e-9
    sm_f = res.wald_test((R2 @ J, q2 - R2 @ c), cov_p=res.normalized_cov_params, use_f=True, scalar=True)
    wf = fit.wald(text2, form="F")
    assert wf.df_denom == res.df_resid == 3 * fit.n_obs - sum(KS) + 1
    np.testing.assert_allclose(wf.statistic, float(np.squeeze(sm_f.fvalue)), rtol=1e-9)
    np.testing.assert_allclose(wf.pvalue, float(sm_f.pvalue), rtol=1e-8)


def test_wald_result_object():
    eqs = _data(seed=34)
    fit = blocksur.EquationSystem(eqs).fit("fgls")
    w = fit.wald("a::x1 = 0")  # a coefficient drawn away from zero: a large statistic
    # chi2(1) Wald of a single coefficient = (b/se)^2 (algebra), p from scipy.stats.chi2
    np.testing.assert_allclose(w.statistic, fit.stat[("a", "x1")] ** 2, rtol=1e-12)
    np.testing.assert_allclose(w.pvalue, stats.chi2.sf(w.statistic, 1), rtol=1e-12)
    np.testing.assert_allclose(w.pvalue, fit.pval[("a", "x1")], rtol=1e-9)
    assert w.rejects(0.05) == (w.pvalue < 0.05)
    assert ("not rejected" in w.verdict(0.05)) == (w.pvalue >= 0.05)
    assert w.h0 == "a::x1 = 0" and w.verdict().endswith("(H0: a::x1 = 0)")
    # the true-null version: a::x1 equal to its own estimate gives W = 0, p = 1
    b = fit.coef[("a", "x1")]
    w0 = fit.wald((np.eye(fit.n_coef)[[1]], np.array([b])))
    assert w0.statistic == pytest.approx(0.0, abs=1e-18)
    assert w0.pvalue == pytest.approx(1.0, abs=1e-12)


@pytest.mark.parametrize("method", ["ols", "fgls", "ifgls"])
def test_wald_of_a_restriction_already_imposed_is_refused(method):
    # After imposing a::x1 = b::x1 at fit time, R V R' = 0 for R = e_a.x1 - e_b.x1 exactly (the
    # restricted estimator satisfies R b_r = q for every sample: Greene's closed form gives
    # R P = 0). A Wald test of that restriction, or of one contradicting it, is undefined; the
    # library documents an InvalidOptionError for it ("R V R' is singular ... coefficients
    # already fixed by the restrictions imposed at fit time"). It must never report a
    # statistic (in particular not a negative one with p = 1).
    eqs = _data(seed=37)
    fit = blocksur.EquationSystem(eqs).fit(method, restrictions="a::x1 = b::x1; a::x2 + c::x2 = 1")
    R, _ = _rows(eqs, TEST_SPEC[:1])
    rvr = float((R @ fit.vcov.to_numpy() @ R.T)[0, 0])
    assert abs(rvr) <= 1e-12 * fit.vcov.to_numpy().diagonal().max()
    wrong = []
    for text in ("a::x1 = b::x1", "a::x1 - b::x1 = 1"):
        try:
            res = fit.wald(text)
        except blocksur.InvalidOptionError:
            continue
        wrong.append(f"wald({text!r}) returned statistic {res.statistic!r}, p = {res.pvalue!r}")
    assert not wrong, f"{method} (R V R' = {rvr!r}) did not refuse: " + "; ".join(wrong)


def test_loglik_formula_and_maximum():
    eqs = _data(seed=35, T=40)
    fit = blocksur.EquationSystem(eqs).fit("ifgls", tol=1e-13)
    E = fit.resid.to_numpy()
    T, N = E.shape
    # textbook concentrated Gaussian log-likelihood, from fit.resid
    ll = -(N * T / 2) * (1 + np.log(2 * np.pi)) - (T / 2) * np.linalg.slogdet(E.T @ E / T)[1]
    err = ref.record("inference: loglik vs formula (rel)", abs(fit.loglik - ll) / abs(ll))
    assert err < 1e-12
    # maximal: perturbing the coefficients in random and in coordinate directions lowers it
    # (the ML estimate maximises the concentrated likelihood, first- and second-order conditions)
    b0 = fit.coef.to_numpy()
    se = fit.se.to_numpy()
    rng = np.random.default_rng(7)
    directions = [np.eye(len(b0))[j] * se[j] for j in range(len(b0))]
    directions += [rng.standard_normal(len(b0)) * se for _ in range(6)]
    for d in directions:
        for step in (0.01, -0.01, 0.3, -0.3):
            assert ir.concentrated_loglik(eqs, b0 + step * d) < fit.loglik
    # the two-step FGLS estimate is a different point with a lower likelihood
    assert blocksur.EquationSystem(eqs).fit("fgls").loglik <= fit.loglik + 1e-9


def test_lr_equals_twice_loglik_difference():
    eqs = _data(seed=36, T=40)
    s = blocksur.EquationSystem(eqs)
    big = s.fit("ifgls", tol=1e-13)
    small = s.fit("ifgls", tol=1e-13, restrictions=TEST_TEXT)
    lr = big.lr_against(small)
    lr2 = small.lr_against(big)
    # LR = 2 (ll_u - ll_r), each ll from the formula on that fit's coefficients (textbook)
    ll_u = ir.concentrated_loglik(eqs, big.coef.to_numpy())
    ll_r = ir.concentrated_loglik(eqs, small.coef.to_numpy())
    expected = 2 * (ll_u - ll_r)
    err = ref.record("inference: LR vs 2(ll_u - ll_r) (rel)", abs(lr.statistic - expected) / expected)
    assert err < 1e-9
    assert lr.statistic == lr2.statistic
    assert (lr.dist, lr.df) == ("chi2", 3)
    np.testing.assert_allclose(lr.pvalue, stats.chi2.sf(expected, 3), rtol=1e-8)
    # non-ML fits are refused
    with pytest.raises(blocksur.InvalidOptionError):
        s.fit("fgls").lr_against(small)


def test_lr_close_to_wald_under_true_restrictions():
    # Restrictions true in the data-generating process, T = 1000: LR and Wald (ML covariance)
    # are asymptotically equivalent (they differ by O_p(T^-1/2) relative; textbook trinity of
    # tests). Loose check: |LR - W| <= 0.1 (1 + W), and both are chi2(2)-sized (below the
    # 99.99% point, scipy.stats.chi2).
    T = 1000
    rng = np.random.default_rng(41)
    x = rng.normal(size=(T, 3))
    Xa = np.column_stack([np.ones(T), x[:, 0], x[:, 1]])
    Xb = np.column_stack([np.ones(T), x[:, 2]])
    omega = np.array([[1.0, 0.6], [0.6, 1.5]])
    e = rng.standard_normal((T, 2)) @ np.linalg.cholesky(omega).T
    ya = Xa @ [1.0, 0.7, -0.3] + e[:, 0]
    yb = Xb @ [-2.0, 0.7] + e[:, 1]  # true: a::x1 = b::x1 and a::x2 = -0.3
    s = blocksur.EquationSystem({"a": (ya, Xa), "b": (yb, Xb)})
    text = "a::x1 = b::x1; a::x2 = -0.3"
    big = s.fit("ifgls", tol=1e-12)
    small = s.fit("ifgls", tol=1e-12, restrictions=text)
    lr = big.lr_against(small).statistic
    w = big.wald(text).statistic
    ref.record("inference: |LR - Wald| / (1 + Wald), T=1000, true null", abs(lr - w) / (1 + w))
    assert abs(lr - w) <= 0.1 * (1 + w)
    assert max(lr, w) < stats.chi2.ppf(0.9999, 2)
    assert lr > 0 and w > 0


def test_joint_wald_is_invariant_to_the_units_of_the_regressors():
    """Regressors in very different units (income in dollars, a share): the joint Wald
    statistic does not depend on the units (rescaling a regressor rescales its coefficient and
    its covariance row together; common practice). It had been refused as 'R V R' singular'
    when the units put R V R' eigenvalues 1e12 apart; compared with the same test with income
    in millions, and with the definition (R b)' (R V R')^-1 (R b) computed here."""
    rng = np.random.default_rng(4)
    T = 200
    income = rng.normal(50_000, 15_000, size=T)
    share = rng.uniform(0, 1, size=T)
    u = rng.multivariate_normal([0, 0], [[1, 0.5], [0.5, 1]], size=T)
    y1 = 1 + 2e-5 * income + 0.8 * share + u[:, 0]
    X2 = np.column_stack([np.ones(T), rng.normal(size=T)])
    y2 = X2 @ [0.3, 1.0] + u[:, 1]
    stats_ = []
    for scale in (1.0, 1e-6):
        X1 = np.column_stack([np.ones(T), income * scale, share])
        fit = blocksur.EquationSystem({"a": (y1, X1), "b": (y2, X2)},
                                      regressor_names={"a": ["const", "income", "share"], "b": ["const", "x"]}).fit("fgls")
        w = fit.wald("a::income = 0; a::share = 0")
        R = np.zeros((2, 5))
        R[0, 1] = R[1, 2] = 1
        b, V = fit.coef.to_numpy(), fit.vcov.to_numpy()
        expect = float((R @ b) @ np.linalg.solve(R @ V @ R.T, R @ b))
        np.testing.assert_allclose(w.statistic, expect, rtol=1e-9)
        stats_.append(w.statistic)
    err = ref.record("inference: joint Wald, income in dollars vs millions (rel)", abs(stats_[0] / stats_[1] - 1))
    assert err < 1e-8


@pytest.mark.parametrize("factor", [1e200, -1e-200, 1e300, 1e-300])
def test_wald_is_invariant_to_the_scale_of_each_restriction_row(factor):
    """(R, q) and (D R, D q) for a diagonal D != 0 state the same hypotheses, and the Wald
    statistic is the same (definition: D cancels in (Rb-q)'(R V R')^-1 (Rb-q)); rows are
    scaled by their largest entry first (rows times 1e+-200 had made R V R' over- or underflow
    and the test was refused as singular)."""
    eqs = _data()
    R, q = _rows(eqs, TEST_SPEC)
    fit = blocksur.EquationSystem(eqs).fit("fgls")
    base = fit.wald((R, q))
    d = np.array([factor, 1.0, 1.0 / factor])[: len(q)]
    scaled = fit.wald((R * d[:, None], q * d))
    assert scaled.statistic == pytest.approx(base.statistic, rel=1e-12)
    assert scaled.df == base.df


def test_wald_names_an_overflowing_covariance_and_tests_the_other_coefficients():
    """A regressor in units of 1e-200 has a variance near 1e400, beyond double precision: a
    Wald test involving its coefficient is refused with that cause (it had been called
    "singular"), while tests of the other coefficients equal those of the unscaled fit (the
    rescaling of one regressor leaves the others' estimates and covariance unchanged; common
    practice, no source needed)."""
    eqs = _data()
    base = blocksur.EquationSystem(eqs).fit("fgls")
    ya, Xa = eqs["a"]
    c = np.array([1.0, 1e-200, 1.0])
    fit = blocksur.EquationSystem({**eqs, "a": (ya, Xa * c)}).fit("fgls")
    with pytest.raises(blocksur.errors.InvalidOptionError, match="beyond double precision"):
        fit.wald("a::x1 = 0")
    others = "b::x1 = c::x1; a::x2 = 0"
    assert fit.wald(others).statistic == pytest.approx(base.wald(others).statistic, rel=1e-9)
    # the single coefficient's z statistic is still there, from its standard error
    assert fit.stat[("a", "x1")] == pytest.approx(base.stat[("a", "x1")], rel=1e-9)
