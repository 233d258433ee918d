"""Many independent systems at once (blocksur.fit_groups, blocksur.fit_stacked).

Outside reference: single fits of each group's rows, ``EquationSystem(...).fit(...)`` in a Python
loop in the test (coefficients, standard errors, Omega, log-likelihood, iterations to 1e-12),
and scipy.stats for the p-values of the tidy table. A group that cannot be estimated gets its own
typed error; the other groups are unaffected.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import stats

import blocksur
from blocksur.errors import InputError, InvalidOptionError, ShapeMismatchError, UnknownColumnError
from reference import record
from scale_support import rel


def _panel(n_groups=25, seed=31, sizes=(30, 45)):
    """A long table: groups of uneven size (rows shuffled), three equations each with its own
    two regressors plus a shared one."""
    rng = np.random.default_rng(seed)
    counts = rng.integers(sizes[0], sizes[1], n_groups)
    g = np.repeat([f"store{i:02d}" for i in range(n_groups)], counts)
    region = np.repeat(rng.choice(["east", "west"], n_groups), counts)
    n = len(g)
    cols = {"store": g, "region": region, "price": rng.normal(size=n)}
    e = rng.multivariate_normal(np.zeros(3), [[1, 0.5, 0.3], [0.5, 1, 0.4], [0.3, 0.4, 1]], size=n)
    for i in range(3):
        a, b = rng.normal(size=n), rng.normal(size=n)
        cols[f"a{i}"], cols[f"b{i}"] = a, b
        cols[f"y{i}"] = 1 + 0.5 * a - b + 0.3 * cols["price"] + e[:, i]
    frame = pd.DataFrame(cols).sample(frac=1.0, random_state=seed).reset_index(drop=True)
    eqs = {f"e{i}": (f"y{i}", [f"a{i}", f"b{i}", "price"]) for i in range(3)}
    return frame, eqs


def _check_group(many, key, fit, label):
    # reference: the single in-memory fit of this group's rows
    d = record(f"{label} vs single fits: coef (rel)", rel(many.coef.loc[key].to_numpy(), fit.coef.to_numpy()))
    assert d <= 1e-12
    d = record(f"{label} vs single fits: se (rel)", rel(many.se.loc[key].to_numpy(), fit.se.to_numpy()))
    assert d <= 1e-12
    d = record(f"{label} vs single fits: omega (rel)", rel(many.omega_of(key).to_numpy(), fit.omega.to_numpy()))
    assert d <= 1e-12
    st = many.status.loc[key]
    assert abs(st["loglik"] - fit.loglik) <= 1e-12 * abs(fit.loglik)
    assert st["n_iter"] == fit.n_iter and bool(st["converged"]) == fit.converged
    assert st["n_obs"] == fit.n_obs


@pytest.mark.parametrize("method,omega", [("fgls", "ml"), ("ifgls", "dof"), ("fgls", "ledoit-wolf")])
def test_groups_equal_single_fits(method, omega):
    frame, eqs = _panel()
    many = blocksur.fit_groups(frame, "store", eqs, constant=True, method=method, omega=omega, threads=2)
    assert many.n_failed == 0 and len(many) == 25
    for key, rows in frame.groupby("store"):
        fit = blocksur.EquationSystem.from_table(rows, eqs, constant=True).fit(method, omega=omega)
        _check_group(many, key, fit, f"fit_groups {method}/{omega}")
    t = many.table
    assert list(t.columns) == ["store", "equation", "regressor", "estimate", "se", "stat", "pval"]
    assert len(t) == 25 * 12
    row = t[(t.store == "store03") & (t.equation == "e1") & (t.regressor == "price")].iloc[0]
    assert row["estimate"] == many.coef.loc["store03", ("e1", "price")]
    # reference: scipy's normal distribution for the two-sided p-value
    np.testing.assert_allclose(row["pval"], 2 * stats.norm.sf(abs(row["estimate"] / row["se"])), rtol=1e-12, atol=0)


def test_two_key_columns_and_t_inference():
    frame, eqs = _panel(n_groups=8, seed=32)
    many = blocksur.fit_groups(frame, ["region", "store"], eqs, constant=True, inference="t")
    assert many.groups.names == ["region", "store"]
    assert list(many.table.columns[:2]) == ["region", "store"]
    key = many.groups[3]
    rows = frame[(frame.region == key[0]) & (frame.store == key[1])]
    fit = blocksur.EquationSystem.from_table(rows, eqs, constant=True).fit("fgls", inference="t")
    part = many.table[(many.table.region == key[0]) & (many.table.store == key[1])]
    # reference: the single fit's t-based p-values (T_g - K_i degrees of freedom)
    np.testing.assert_allclose(part["pval"].to_numpy(), fit.pval.to_numpy(), rtol=1e-10, atol=1e-300)


def test_bad_groups_get_their_errors_and_the_others_are_kept():
    frame, eqs = _panel(n_groups=10, seed=33)
    # store01: too few rows; store04: a regressor equal to another; store07: a NaN kept by missing="raise"
    frame = frame.drop(index=frame.index[frame.store == "store01"][3:])
    keep01 = int((frame.store == "store01").sum())
    assert keep01 == 3  # fewer rows than the 4 regressors of each equation
    m4 = frame.store == "store04"
    frame.loc[m4, "b2"] = 2.0 * frame.loc[m4, "a2"]
    frame.loc[frame.index[frame.store == "store07"][3], "y0"] = np.nan
    many = blocksur.fit_groups(frame, "store", eqs, constant=True, missing="raise")
    err = many.errors
    assert list(err.index) == ["store01", "store04", "store07"]
    assert err.loc["store01", "error"] == "TooFewObservationsError"
    assert f"only {keep01} observations" in err.loc["store01", "message"]
    assert err.loc["store04", "error"] == "CollinearityError"
    assert "equation 'e2'" in err.loc["store04", "message"] and "'b2'" in err.loc["store04", "message"]
    assert err.loc["store07", "error"] == "NonFiniteError"
    assert "equation 'e0'" in err.loc["store07", "message"]
    assert np.isnan(many.coef.loc["store04"]).all()
    assert set(many.table.store) == {f"store{i:02d}" for i in range(10)} - {"store01", "store04", "store07"}
    for key in ("store00", "store05", "store09"):
        fit = blocksur.EquationSystem.from_table(frame[frame.store == key], eqs, constant=True).fit("fgls")
        _check_group(many, key, fit, "fit_groups next to failed groups")
    # with missing="drop" the NaN row is skipped and store07 is estimated
    dropped = blocksur.fit_groups(frame, "store", eqs, constant=True)
    assert dropped.status.loc["store07", "n_dropped"] == 1 and dropped.status.loc["store07", "error"] is None
    fit7 = blocksur.EquationSystem.from_table(frame[frame.store == "store07"], eqs, constant=True).fit("fgls")
    _check_group(dropped, "store07", fit7, "fit_groups after dropping a row")


@pytest.mark.parametrize("shared", [False, True])
def test_stacked_equal_single_fits(shared):
    rng = np.random.default_rng(34)
    g, t, n = 40, 50, 3
    y = rng.normal(size=(g, t, n))
    if shared:
        x = np.concatenate([np.ones((g, t, 1)), rng.normal(size=(g, t, 2))], axis=2)
        xl = [x] * n
    else:
        xl = [rng.normal(size=(g, t, k)) for k in (2, 3, 2)]
        x = xl
    y += np.stack([a.sum(axis=2) for a in xl], axis=2)
    labels = pd.Index([f"s{i}" for i in range(g)], name="series")
    many = blocksur.fit_stacked(y, x, equations={"u": ["p", "q"] if not shared else ["c", "p", "q"],
                                                 "v": ["p", "q", "r"] if not shared else ["c", "p", "q"],
                                                 "w": ["p", "q"] if not shared else ["c", "p", "q"]},
                                groups=labels, constant=not shared, method="ifgls", threads=2)
    assert many.n_failed == 0
    assert many.table.columns[0] == "series"
    for s in range(0, g, 7):
        xs = [a[s] if shared else np.column_stack([np.ones(t), a[s]]) for a in xl]
        fit = blocksur.EquationSystem([(y[s, :, i], xs[i]) for i in range(n)]).fit("ifgls")
        _check_group(many, f"s{s}", fit, f"fit_stacked (shared={shared})")
    one = blocksur.fit_stacked(y, x, constant=not shared, method="ifgls", threads=1)
    np.testing.assert_array_equal(one.coef.to_numpy(), many.coef.to_numpy())  # threads do not change results


def test_options_and_shapes_are_checked():
    frame, eqs = _panel(n_groups=3)
    with pytest.raises(UnknownColumnError):
        blocksur.fit_groups(frame, "shop", eqs)
    with pytest.raises(InputError, match="by must be"):
        blocksur.fit_groups(frame, 3, eqs)
    with pytest.raises(InvalidOptionError, match="threads"):
        blocksur.fit_groups(frame, "store", eqs, threads=0)
    with pytest.raises(InvalidOptionError, match="unknown method"):
        blocksur.fit_groups(frame, "store", eqs, method="gls")
    with pytest.raises(ShapeMismatchError, match=r"\(G systems, T rows, N equations\)"):
        blocksur.fit_stacked(np.zeros((3, 4)), np.zeros((3, 4, 1)))
    with pytest.raises(ShapeMismatchError, match="regressor array 1"):
        blocksur.fit_stacked(np.zeros((3, 9, 2)), [np.zeros((3, 9, 1)), np.zeros((3, 8, 1))])
