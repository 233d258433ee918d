"""Systems built from one table (EquationSystem.from_table): formulas through formulaic,
column pairs, the common sample, typed errors, polars and Arrow input.

Outside references: the same system built by hand from numpy arrays (the design written out
column by column, no formula library), statsmodels' formula OLS (``smf.ols``) per equation,
and pandas' own missing-value detection (``DataFrame.isna``)."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import statsmodels.formula.api as smf

import blocksur
from blocksur.scenarios import grid_load_table, household_budget
from reference import record

FORMULAS = {
    "north": "y1 ~ x1 + C(kind) + np.log(z) + x1:z",
    "south": "y2 ~ x2 + z",
    "east": "y3 ~ x1 + x3 - 1",
}


def _table(seed: int = 3, n: int = 120, holes: bool = True) -> pd.DataFrame:
    rng = np.random.default_rng(seed)
    kind = rng.choice(["alpha", "beta", "gamma"], n)
    x1, x2, x3 = rng.normal(size=(3, n))
    z = rng.uniform(0.5, 3.0, n)
    e = rng.multivariate_normal([0, 0, 0], [[1, 0.6, 0.3], [0.6, 1, 0.5], [0.3, 0.5, 1]], size=n)
    df = pd.DataFrame(
        {
            "y1": 1 + 2 * x1 + (kind == "beta") * 0.5 - (kind == "gamma") + 0.8 * np.log(z) + 0.3 * x1 * z + e[:, 0],
            "y2": -1 + 0.5 * x2 + 0.7 * z + e[:, 1],
            "y3": 1.5 * x1 - x3 + e[:, 2],
            "x1": x1,
            "x2": x2,
            "x3": x3,
            "z": z,
            "kind": kind,
            "unused": np.where(rng.random(n) < 0.2, np.nan, 1.0),
        },
        index=pd.Index([f"r{i:03d}" for i in range(n)], name="id"),
    )
    if holes:
        df.loc["r005", "y1"] = np.nan
        df.loc["r017", "x2"] = np.nan
        df.loc["r042", "x3"] = np.nan
        df.loc["r042", "y2"] = np.nan
        df.loc["r099", "kind"] = None
    return df


def _by_hand(df: pd.DataFrame) -> dict[str, tuple[np.ndarray, np.ndarray]]:
    """The designs written out with numpy (the reference for the formula side)."""
    one = np.ones(len(df))
    x1, x2, x3, z = (df[c].to_numpy(float) for c in ("x1", "x2", "x3", "z"))
    kind = df["kind"].to_numpy()
    north = np.column_stack([one, x1, (kind == "beta") * 1.0, (kind == "gamma") * 1.0, np.log(z), x1 * z])
    return {
        "north": (df["y1"].to_numpy(float), north),
        "south": (df["y2"].to_numpy(float), np.column_stack([one, x2, z])),
        "east": (df["y3"].to_numpy(float), np.column_stack([x1, x3])),
    }


@pytest.mark.parametrize("method", ["ols", "fgls", "ifgls"])
def test_formula_system_equals_array_system(method):
    df = _table()
    system = blocksur.EquationSystem.from_table(df, FORMULAS)
    # reference: pandas' isna over the columns the formulas use, then the designs by hand
    used = ["y1", "y2", "y3", "x1", "x2", "x3", "z", "kind"]
    complete = df.dropna(subset=used)
    assert list(system.sample_info.rows_used) == list(complete.index)
    assert sorted(system.sample_info.rows_dropped) == ["r005", "r017", "r042", "r099"]
    hand = blocksur.EquationSystem(_by_hand(complete))
    got, ref = system.fit(method), hand.fit(method)
    assert got.n_obs == len(complete) == 116
    # the regressors as formulaic names them, in the order of the formula's terms
    assert got.coef.loc["north"].index.tolist() == [
        "Intercept", "x1", "C(kind)[T.beta]", "C(kind)[T.gamma]", "np.log(z)", "x1:z"
    ]
    assert got.coef.loc["east"].index.tolist() == ["x1", "x3"]
    d = record(f"from_table vs arrays by hand: coef [{method}] (abs)",
               np.max(np.abs(got.coef.to_numpy() - ref.coef.to_numpy())))
    assert d <= 1e-12
    np.testing.assert_allclose(got.se.to_numpy(), ref.se.to_numpy(), rtol=1e-12, atol=0)
    np.testing.assert_allclose(got.omega.to_numpy(), ref.omega.to_numpy(), rtol=1e-12, atol=0)
    # residuals keep the table's index labels of the rows used
    assert got.resid.index.equals(complete.index)
    assert got.fitted.index.name == "id"


def test_formula_ols_matches_statsmodels_formula_ols():
    df = _table()
    fit = blocksur.EquationSystem.from_table(df, FORMULAS).fit("ols", omega="dof", inference="t")
    complete = df.loc[fit.rows_used]
    for name, formula in FORMULAS.items():
        # reference: statsmodels formula OLS with the same formula on the common sample
        ref = smf.ols(formula, complete).fit()
        got_b, got_se = fit.coef.loc[name], fit.se.loc[name]
        assert set(ref.params.index) == set(got_b.index), name
        ref_b = ref.params.reindex(got_b.index)
        d = record("from_table OLS vs statsmodels formula OLS: coef (rel)",
                   np.max(np.abs(got_b - ref_b) / np.maximum(np.abs(ref_b), ref.bse.reindex(got_b.index))))
        assert d <= 1e-10
        np.testing.assert_allclose(got_se.to_numpy(), ref.bse.reindex(got_b.index).to_numpy(), rtol=1e-9, atol=0)
        np.testing.assert_allclose(fit.pval.loc[name].to_numpy(), ref.pvalues.reindex(got_b.index).to_numpy(),
                                   rtol=1e-7, atol=1e-14)
        np.testing.assert_allclose(fit.r2[name], ref.rsquared, rtol=1e-10, atol=0)


def test_column_pairs_with_constant_match_statsmodels():
    df = _table(holes=False)
    spec = [("y2", ["x2", "z"]), ("y3", ["x1", "x3"])]
    fit = blocksur.EquationSystem.from_table(df, spec, constant=True).fit("ols", omega="dof")
    assert fit.equation_names == ["y2", "y3"]  # named after the dependent columns
    assert fit.coef.loc["y2"].index.tolist() == ["Intercept", "x2", "z"]
    # reference: statsmodels formula OLS, intercept included by default
    for name, formula in {"y2": "y2 ~ x2 + z", "y3": "y3 ~ x1 + x3"}.items():
        ref = smf.ols(formula, df).fit()
        np.testing.assert_allclose(fit.coef.loc[name].to_numpy(), ref.params.to_numpy(), rtol=1e-11, atol=1e-13)
    no_const = blocksur.EquationSystem.from_table(df, spec).fit("ols")
    assert no_const.coef.loc["y2"].index.tolist() == ["x2", "z"]
    assert no_const.rows_dropped.empty and fit.rows_dropped.empty


def test_mixed_specs_names_and_dict_labels():
    df = _table(holes=False)
    system = blocksur.EquationSystem.from_table(df, ["y1 ~ x1", ("y2", "x2")], constant=True)
    assert system.equation_names == ["y1", "y2"]
    assert system.regressor_names == {"y1": ["Intercept", "x1"], "y2": ["Intercept", "x2"]}
    labelled = blocksur.EquationSystem.from_table(df, {"first": "y1 ~ x1", "second": "np.log(z) ~ x2"})
    assert labelled.equation_names == ["first", "second"]
    # a transformed dependent variable: reference numpy log of the column
    fit = labelled.fit("ols")
    np.testing.assert_allclose(fit.fitted["second"] + fit.resid["second"], np.log(df["z"]), rtol=1e-14, atol=0)


def test_transform_nonfinite_rows_dropped_for_all_equations():
    df = _table(holes=False)
    df.loc["r010", "z"] = 0.0  # np.log(0) = -inf in the north equation only
    system = blocksur.EquationSystem.from_table(df, FORMULAS)
    info = system.sample_info
    assert list(info.rows_dropped) == ["r010"]
    assert info.dropped_missing == 0 and info.dropped_nonfinite == 1
    assert "transform" in info.describe()
    assert "r010" not in system.fit("ols").resid.index


def test_unknown_column_names_equation_and_column():
    df = _table()
    with pytest.raises(blocksur.UnknownColumnError) as err:
        blocksur.EquationSystem.from_table(df, {"north": "y1 ~ x1 + heat", "south": "y2 ~ x2"})
    assert err.value.equation == "north" and err.value.column == "heat"
    assert "'heat'" in str(err.value) and "north" in str(err.value)
    with pytest.raises(blocksur.UnknownColumnError) as err:
        blocksur.EquationSystem.from_table(df, [("y2", ["x2", "zz"])])
    assert err.value.column == "zz" and err.value.suggestions == ["z"]
    assert "did you mean 'z'" in str(err.value)
    assert isinstance(err.value, blocksur.InputError) and isinstance(err.value, ValueError)


@pytest.mark.parametrize("bad", ["y1 ~ x1 + (", "y1 x1", "y1 + y2 ~ x1"])
def test_unreadable_formula_names_it(bad):
    df = _table()
    with pytest.raises(blocksur.FormulaError) as err:
        blocksur.EquationSystem.from_table(df, {"north": bad, "south": "y2 ~ x2"})
    assert err.value.equation == "north" and err.value.formula == bad
    assert "north" in str(err.value)


def test_text_column_in_pair_form_says_use_a_formula():
    df = _table(holes=False)
    with pytest.raises(blocksur.InputError, match=r"C\(kind\)"):
        blocksur.EquationSystem.from_table(df, [("y1", ["x1", "kind"])])


def test_duplicate_equation_names_rejected():
    df = _table(holes=False)
    with pytest.raises(blocksur.ShapeMismatchError, match="more than once"):
        blocksur.EquationSystem.from_table(df, ["y1 ~ x1", "y1 ~ x2"])


def test_everything_missing_is_a_clear_error():
    df = _table(holes=False)
    df["x2"] = np.nan
    with pytest.raises(blocksur.InputError, match="'x2'"):
        blocksur.EquationSystem.from_table(df, ["y1 ~ x1", "y2 ~ x2"])


def test_arrow_and_dict_input_give_the_same_fit():
    pa = pytest.importorskip("pyarrow")
    df = _table().reset_index(drop=True)
    ref = blocksur.EquationSystem.from_table(df, FORMULAS).fit("fgls")
    table = pa.Table.from_pandas(df, preserve_index=False)
    got = blocksur.EquationSystem.from_table(table, FORMULAS).fit("fgls")
    np.testing.assert_array_equal(got.coef.to_numpy(), ref.coef.to_numpy())
    assert list(got.rows_dropped) == [5, 17, 42, 99]
    cols = {c: df[c].to_numpy() for c in ("y2", "x2", "z")}
    pair = blocksur.EquationSystem.from_table(cols, [("y2", ["x2", "z"])], constant=True).fit("ols")
    ref2 = smf.ols("y2 ~ x2 + z", df).fit()  # reference: statsmodels (drops the missing rows itself)
    np.testing.assert_allclose(pair.coef.to_numpy(), ref2.params.to_numpy(), rtol=1e-11, atol=1e-13)


def test_polars_input_gives_the_same_fit():
    pl = pytest.importorskip("polars")
    df = _table().reset_index(drop=True)
    ref = blocksur.EquationSystem.from_table(df, FORMULAS).fit("ifgls")
    frame = pl.from_pandas(df)
    got = blocksur.EquationSystem.from_table(frame, FORMULAS).fit("ifgls")
    np.testing.assert_array_equal(got.coef.to_numpy(), ref.coef.to_numpy())
    pair = blocksur.EquationSystem.from_table(frame, [("y2", ["x2", "z"]), ("y3", ["x1", "x3"])], constant=True)
    pair_ref = blocksur.EquationSystem.from_table(df, [("y2", ["x2", "z"]), ("y3", ["x1", "x3"])], constant=True)
    np.testing.assert_array_equal(pair.fit("fgls").coef.to_numpy(), pair_ref.fit("fgls").coef.to_numpy())
    assert list(pair.sample_info.rows_dropped) == [17, 42]


def test_predict_from_a_new_table_reapplies_the_formulas():
    data = grid_load_table(n_districts=3, n_days=400, seed=4, n_future=7)
    fit = blocksur.EquationSystem.from_table(data.frame, data.equations).fit("fgls")
    pred = fit.predict(data.future)
    assert pred.index.equals(data.future.index)  # the new table's index is kept
    # reference: the prediction written out by hand from the future table's columns
    b = fit.coef.loc["harbour"]
    f = data.future
    by_hand = (b["Intercept"] + b["hdd_harbour"] * f["hdd_harbour"] + b["cdd_harbour"] * f["cdd_harbour"]
               + b["industry_harbour"] * f["industry_harbour"]
               + np.select([f["day_type"] == "saturday", f["day_type"] == "sunday", f["day_type"] == "workday"],
                           [b["C(day_type)[T.saturday]"], b["C(day_type)[T.sunday]"], b["C(day_type)[T.workday]"]],
                           0.0))
    np.testing.assert_allclose(pred["harbour"].to_numpy(), by_hand.to_numpy(), rtol=1e-12, atol=0)
    with pytest.raises(blocksur.UnknownColumnError, match="hdd_hillside"):
        fit.predict(data.future.drop(columns="hdd_hillside"))


def test_scenario_tables_fit():
    budget = household_budget(n_obs=300)
    spec = {k: v for k, v in budget.equations.items() if k != "leisure"}
    fit = blocksur.EquationSystem.from_table(budget.frame, spec).fit("ifgls")
    assert fit.converged and fit.n_eq == 3
    # reference: the generator's own adding-up identity, shares sum to one in every row
    np.testing.assert_allclose(budget.frame.filter(like="share_").sum(axis=1), 1.0, rtol=0, atol=1e-12)
