"""Tables for pipelines: one long table of coefficients, wide views, per-equation statistics,
forecasts, and a JSON-safe dict (and pickle state) of a whole fit.

Example
-------
>>> import json, blocksur
>>> from blocksur.scenarios import random_system
>>> fit = blocksur.EquationSystem(random_system(3, 80, seed=2).equations).fit("fgls")
>>> list(fit.long_table().columns)
['equation', 'regressor', 'estimate', 'se', 'stat', 'pval', 'lower', 'upper']
>>> back = blocksur.FittedSystem.from_dict(json.loads(json.dumps(fit.to_dict())))
>>> bool((back.coef == fit.coef).all())
True
"""

from __future__ import annotations

import math
from typing import TYPE_CHECKING, Any

import numpy as np
import pandas as pd

from ._system import SystemLabels
from ._fit import check_level
from .errors import DataNotKeptError, InputError, InvalidOptionError

if TYPE_CHECKING:  # pragma: no cover
    from ._fit import FittedSystem

__all__ = [
    "long_table",
    "wide_table",
    "equation_stats",
    "forecast_table",
    "fit_to_dict",
    "fit_from_dict",
    "pickle_state",
    "restore_pickle",
]

FORMAT = "blocksur.FittedSystem"
VERSION = 1
_QUANTITIES = ("estimate", "se", "stat", "pval", "lower", "upper")


# -- tables ----------------------------------------------------------------------------------------
def long_table(fit: "FittedSystem", level: float = 0.95) -> pd.DataFrame:
    """One row per coefficient: equation, regressor, estimate, se, stat, pval, lower, upper."""
    t = fit.coef_table(level)
    out = t.reset_index()
    out.columns = ["equation", "regressor", *_QUANTITIES]
    return out


def wide_table(fit: "FittedSystem", quantity: str = "estimate", level: float = 0.95) -> pd.DataFrame:
    """Regressors down, equations across, for one quantity; NaN where an equation lacks the
    regressor. Rows follow the order in which regressors first appear."""
    if quantity not in _QUANTITIES:
        raise InvalidOptionError(f"unknown quantity {quantity!r}: use one of {list(_QUANTITIES)}")
    s = fit.coef_table(level)[quantity]
    order: list[str] = []
    seen = set()
    for _, reg in s.index:
        if reg not in seen:
            seen.add(reg)
            order.append(reg)
    wide = s.unstack("equation")
    return wide.reindex(index=order, columns=fit.equation_names).rename_axis(
        index="regressor", columns="equation"
    )


def equation_stats(fit: "FittedSystem") -> pd.DataFrame:
    """One row per equation: regressors, residual degrees of freedom, R-squared, adjusted
    R-squared, residual standard error, sum of squared residuals."""
    k = fit.coef.groupby(level="equation", sort=False).size().reindex(fit.equation_names)
    return pd.DataFrame(
        {
            "n_regressors": k.to_numpy(),
            "df_resid": fit.df_resid.to_numpy(),
            "r2": fit.r2.to_numpy(),
            "r2_adj": fit.r2_adj.to_numpy(),
            "resid_se": fit.resid_se.to_numpy(),
            "ssr": fit.ssr.to_numpy(),
        },
        index=pd.Index(fit.equation_names, name="equation"),
    )


def forecast_table(fit: "FittedSystem", new: Any, level: float = 0.95, interval: str = "mean") -> pd.DataFrame:
    """Predictions in long form, indexed by (new row label, equation): predicted value, its
    standard error and interval bounds. ``interval="mean"`` bounds the expected value;
    ``"observation"`` adds the error variance omega_ii to bound a new observation (normal
    errors assumed)."""
    if interval not in ("mean", "observation"):
        raise InvalidOptionError(f"interval must be 'mean' or 'observation', got {interval!r}")
    check_level(level)
    from scipy import stats

    pred = fit.predict(new)
    se = fit.prediction_se(new)
    if interval == "observation":
        var = np.diag(fit.omega.to_numpy())
        se = np.sqrt(se**2 + var)
    if fit.inference == "t":
        crit = stats.t.ppf(0.5 + level / 2, fit.df_resid.to_numpy())
    else:
        crit = np.full(fit.n_eq, stats.norm.ppf(0.5 + level / 2))
    lower = pred - se * crit
    upper = pred + se * crit
    row_name = pred.index.name or "row"
    parts = {
        "predicted": pred.stack(future_stack=True),
        "se": se.stack(future_stack=True),
        "lower": lower.stack(future_stack=True),
        "upper": upper.stack(future_stack=True),
    }
    out = pd.DataFrame(parts)
    out.index = out.index.set_names([row_name, "equation"])
    return out


# -- encoding helpers (JSON-safe) ------------------------------------------------------------------
_NONFINITE = {"NaN": math.nan, "Infinity": math.inf, "-Infinity": -math.inf}


def _num(x: float) -> float | str:
    x = float(x)
    if math.isfinite(x):
        return x
    return "NaN" if math.isnan(x) else ("Infinity" if x > 0 else "-Infinity")


def _unnum(v: Any) -> float:
    return _NONFINITE[v] if isinstance(v, str) else float(v)


def _arr(a: Any) -> dict[str, Any]:
    a = np.asarray(a, dtype=float)
    flat = a.ravel(order="C")
    if np.isfinite(flat).all():
        data = flat.tolist()
    else:
        data = [_num(v) for v in flat]
    return {"shape": list(a.shape), "data": data}


def _unarr(d: dict[str, Any]) -> np.ndarray:
    data = d["data"]
    if any(isinstance(v, str) for v in data):
        data = [_unnum(v) for v in data]
    return np.asarray(data, dtype=float).reshape(d["shape"])


def _index_to_json(idx: pd.Index) -> dict[str, Any]:
    name = None if idx.name is None else str(idx.name)
    if isinstance(idx, pd.RangeIndex):
        return {"kind": "range", "start": int(idx.start), "stop": int(idx.stop), "step": int(idx.step), "name": name}
    if isinstance(idx, pd.DatetimeIndex):
        freq = idx.freqstr if idx.freq is not None else None
        tz = str(idx.tz) if idx.tz is not None else None
        naive = idx.tz_convert("UTC").tz_localize(None) if tz else idx
        return {"kind": "datetime", "values": [t.isoformat() for t in naive], "tz": tz, "freq": freq,
                "unit": str(idx.unit), "name": name}
    if isinstance(idx, pd.MultiIndex):
        return {"kind": "text", "values": [str(v) for v in idx], "name": name}
    if pd.api.types.is_bool_dtype(idx.dtype):
        return {"kind": "bool", "values": [bool(v) for v in idx], "name": name}
    if pd.api.types.is_integer_dtype(idx.dtype):
        return {"kind": "int", "values": [int(v) for v in idx], "name": name}
    if pd.api.types.is_float_dtype(idx.dtype):
        return {"kind": "float", "values": [_num(v) for v in idx], "name": name}
    if all(isinstance(v, str) for v in idx):
        return {"kind": "str", "values": list(idx), "name": name}
    return {"kind": "text", "values": [str(v) for v in idx], "name": name}


def _index_from_json(d: dict[str, Any]) -> pd.Index:
    kind, name = d["kind"], d.get("name")
    if kind == "range":
        return pd.RangeIndex(d["start"], d["stop"], d["step"], name=name)
    if kind == "datetime":
        idx = pd.DatetimeIndex(pd.to_datetime(d["values"]), name=name)
        if d.get("unit"):
            idx = idx.as_unit(d["unit"])
        if d.get("tz"):
            idx = idx.tz_localize("UTC").tz_convert(d["tz"])
        if d.get("freq"):
            idx = pd.DatetimeIndex(idx, freq=d["freq"])
        return idx
    if kind == "int":
        return pd.Index(np.asarray(d["values"], dtype=np.int64), name=name)
    if kind == "float":
        return pd.Index(np.asarray([_unnum(v) for v in d["values"]], dtype=float), name=name)
    if kind == "bool":
        return pd.Index(d["values"], dtype=bool, name=name)
    return pd.Index(d["values"], dtype=object, name=name)


# -- stand-ins for the compiled objects of a restored fit --------------------------------------------
def _attrs(obj: Any) -> dict[str, Any]:
    """The public data attributes of a compiled object as plain values (float arrays stay
    numpy arrays), so that fields added to the core later are saved without code here."""
    out: dict[str, Any] = {}
    for name in dir(obj):
        if name.startswith("_"):
            continue
        try:
            v = getattr(obj, name)
        except Exception:  # a property that cannot be computed for this object
            continue
        if callable(v):
            continue
        if isinstance(v, np.ndarray):
            out[name] = np.array(v, dtype=float) if v.dtype.kind == "f" else v.tolist()
        elif isinstance(v, (list, tuple)):
            if all(isinstance(e, (bool, int, float, str, type(None), np.generic)) for e in v):
                out[name] = [e.item() if isinstance(e, np.generic) else e for e in v]
        elif isinstance(v, (bool, int, float, str, type(None))):
            out[name] = v
        elif isinstance(v, np.generic):
            out[name] = v.item()
    return out


def _plain(obj: Any) -> Any:
    """Undoes the JSON encoding: ``{"shape", "data"}`` dicts to arrays, NaN tokens to floats."""
    if isinstance(obj, dict):
        if set(obj) == {"shape", "data"}:
            return _unarr(obj)
        return {k: _plain(v) for k, v in obj.items()}
    if isinstance(obj, list):
        return [_plain(v) for v in obj]
    if isinstance(obj, str) and obj in _NONFINITE:
        return _NONFINITE[obj]
    return obj


class _FrozenEstimate:
    """The numbers of one estimation (every public field of the compiled estimate), without
    the compiled object."""

    def __init__(self, d: dict[str, Any]) -> None:
        self.__dict__.update(d)
        for key in ("coef", "omega", "resid_crossprod"):
            self.__dict__[key] = np.asarray(d[key], dtype=float)


class _RestoredCore:
    """Answers what FittedSystem asks of the compiled ``Prepared`` from stored numbers; anything
    that needs a new pass over the data goes to the system's own data when it was kept."""

    def __init__(self, d: dict[str, Any], system: Any, est: _FrozenEstimate, vcov: np.ndarray | None) -> None:
        fields = {k: v for k, v in d.items() if k not in ("ols_crossprod", "loglik")}
        self.__dict__.update(fields)
        self._ols_crossprod = np.asarray(d["ols_crossprod"], dtype=float)
        self._loglik = d["loglik"]
        self._system = system
        self._est = est
        self._vcov = vcov
        self._vcov_error: str | None = None
        self._live: Any = None

    def _core(self) -> Any:
        if self._live is None:
            self._live = self._system._prepare()
        return self._live

    def ols_crossprod(self) -> np.ndarray:
        return self._ols_crossprod

    def log_likelihood(self, est: Any) -> float | None:
        if est is self._est:
            return self._loglik
        return self._core().log_likelihood(est)

    def coef_covariance(self, est: Any, *args: Any, **kwargs: Any) -> np.ndarray:
        if est is self._est and self._vcov is not None:
            return self._vcov
        if est is self._est and getattr(self, "_vcov_error", None):
            raise InvalidOptionError(self._vcov_error)
        return self._core().coef_covariance(est, *args, **kwargs)

    def estimate(self, *args: Any, **kwargs: Any) -> Any:
        return self._core().estimate(*args, **kwargs)

    def __getattr__(self, name: str) -> Any:
        # methods of the compiled object not stored here (only called on the paths that need
        # the data): go to the rebuilt core, or say that the data were not kept
        if name.startswith("_"):
            raise AttributeError(name)
        return getattr(self._core(), name)


class _RestoredSystem(SystemLabels):
    """The labels and the data kept of a system whose fit was restored from a dict."""

    def __init__(self, names: list[str], regressors: list[list[str]], index: pd.Index,
                 y: np.ndarray, xs: list[np.ndarray] | None, sample: Any) -> None:
        self._names = list(names)
        self._regressors = [list(r) for r in regressors]
        self._index = index
        self._ys = [np.ascontiguousarray(y[:, i]) for i in range(y.shape[1])]
        self._kept_xs = xs
        self._sample = sample
        self._prepared: Any = None

    def __getstate__(self) -> dict[str, Any]:
        state = self.__dict__.copy()
        state["_prepared"] = None
        return state

    @property
    def _xs(self) -> list[np.ndarray]:
        if self._kept_xs is None:
            raise DataNotKeptError(
                "this fit was restored without its regressors: refit the system, or save it "
                "with to_dict(keep_data=True) to use methods that go back to the data"
            )
        return self._kept_xs

    @property
    def sample_info(self) -> Any:
        return self._sample

    @property
    def n_obs(self) -> int:
        return int(self._ys[0].shape[0])

    def _prepare(self, *args: Any, **kwargs: Any) -> Any:
        if self._prepared is None:
            from ._system import EquationSystem

            # a real system on the kept data: the same checks and options as the original
            eqs = {n: (y, x) for n, y, x in zip(self._names, self._ys, self._xs)}
            # the restored arrays belong to this object alone: no copy
            self._prepared = EquationSystem(eqs, regressor_names=self._regressors, copy=False)
        return self._prepared._prepare(*args, **kwargs)


# -- saving ------------------------------------------------------------------------------------------
def _numbers(fit: "FittedSystem") -> dict[str, Any]:
    """Everything a restored fit needs, as numpy arrays and plain Python values."""
    from .errors import BlocksurError

    est, core = fit._est, fit._prepared
    loglik = fit.loglik
    y = np.column_stack(fit._system._ys)
    rs = fit.restrictions
    core_fields = _attrs(core)
    core_fields["ols_crossprod"] = np.asarray(core.ols_crossprod(), dtype=float)
    core_fields["loglik"] = None if not math.isfinite(loglik) else float(loglik)
    vcov_error = None
    try:
        vcov = fit.vcov.to_numpy()
    except BlocksurError as err:  # not formed on the matrix-free path: keep the standard errors
        vcov, vcov_error = None, str(err)
    # the standard errors as computed (from the covariance's diagonal without the K x K matrix,
    # or by conjugate gradients), so a restored fit reports the same bits
    try:
        se = fit.se.to_numpy()
    except BlocksurError:
        se = None
    return {
        "format": FORMAT,
        "version": VERSION,
        "equations": list(fit.equation_names),
        "regressors": [list(r) for r in fit._system._regressors],
        "options": {
            "tol": float(fit.tol),
            "max_iter": int(fit.max_iter),
            "covariance": fit.covariance,
            "inference": fit.inference,
        },
        "estimate": _attrs(est),
        "core": core_fields,
        "vcov": vcov,
        "vcov_error": vcov_error,
        "se": se,
        "dependent": y,
        "resid": np.asarray(fit._residuals(), dtype=float),
        "restrictions": None
        if rs is None
        else {"r": np.asarray(rs.r, dtype=float), "q": np.asarray(rs.q, dtype=float), "texts": list(rs.texts)},
    }


def _sample_to_json(sample: Any) -> dict[str, Any] | None:
    if sample is None:
        return None
    return {
        "n_rows_in": int(sample.n_rows_in),
        "rows_dropped": _index_to_json(sample.rows_dropped),
        "dropped_missing": int(sample.dropped_missing),
        "dropped_nonfinite": int(sample.dropped_nonfinite),
        "columns_missing": {str(k): int(v) for k, v in sample.columns_missing.items()},
        "constant": bool(sample.constant),
        "specs": [
            {"name": s.name, "formula": s.formula, "dependent": s.dependent, "regressors": list(s.regressors),
             "needs": list(s.needs)}
            for s in sample.specs
        ],
    }


def _sample_from_json(d: dict[str, Any] | None, rows_used: pd.Index) -> Any:
    if d is None:
        return None
    from ._frame import SampleInfo, _Spec

    return SampleInfo(
        n_rows_in=d["n_rows_in"],
        rows_used=rows_used,
        rows_dropped=_index_from_json(d["rows_dropped"]),
        dropped_missing=d["dropped_missing"],
        dropped_nonfinite=d["dropped_nonfinite"],
        columns_missing=dict(d["columns_missing"]),
        specs=[_Spec(s["name"], s["formula"], s["dependent"], list(s["regressors"]), list(s["needs"]))
               for s in d["specs"]],
        constant=d["constant"],
    )


def _jsonify(obj: Any) -> Any:
    if isinstance(obj, np.ndarray):
        return _arr(obj)
    if isinstance(obj, dict):
        return {k: _jsonify(v) for k, v in obj.items()}
    if isinstance(obj, list):
        return [_jsonify(v) for v in obj]
    if isinstance(obj, float):
        return _num(obj)
    return obj


def fit_to_dict(fit: "FittedSystem", keep_data: bool = False) -> dict[str, Any]:
    """A dict of plain JSON types (str, int, float, bool, None, lists, dicts) holding the fit:
    options, coefficients, covariance, Omega, residuals, the dependent variables, fit measures'
    ingredients, restrictions, row labels and how the sample was formed. Arrays are stored as
    ``{"shape": [...], "data": [row-major values]}``; NaN and infinities as the strings
    ``"NaN"``, ``"Infinity"``, ``"-Infinity"``. ``keep_data=True`` adds the regressor matrices
    (needed by methods that go back to the data, such as :meth:`FittedSystem.grs_test`)."""
    d = _numbers(fit)
    d["rows"] = _index_to_json(fit._row_index)
    d["sample"] = _sample_to_json(getattr(fit._system, "_sample", None))
    d["regressor_data"] = [np.asarray(x, dtype=float) for x in fit._system._xs] if keep_data else None
    from . import __version__

    d["blocksur_version"] = __version__
    return _jsonify(d)


def _build(cls: type, d: dict[str, Any], system: Any) -> "FittedSystem":
    from ._restrictions import RestrictionSet

    est = _FrozenEstimate(d["estimate"])
    vcov = None if d.get("vcov") is None else np.asarray(d["vcov"], dtype=float)
    core = _RestoredCore(d["core"], system, est, vcov)
    core._vcov_error = d.get("vcov_error")
    rs = d["restrictions"]
    rset = None if rs is None else RestrictionSet(np.asarray(rs["r"], float), np.asarray(rs["q"], float), tuple(rs["texts"]))
    opts = d["options"]
    fit = cls(
        system,
        core,
        est,
        np.asarray(d["resid"], dtype=float),
        tol=opts["tol"],
        max_iter=opts["max_iter"],
        restrictions=rset,
        covariance=opts["covariance"],
        inference=opts["inference"],
    )
    if vcov is not None:
        fit.__dict__["_vcov_array"] = vcov
        fit.__dict__["vcov"] = pd.DataFrame(vcov, index=fit._coef_index, columns=fit._coef_index)
    if d.get("se") is not None:
        fit.__dict__["se"] = pd.Series(np.asarray(d["se"], dtype=float), index=fit._coef_index, name="se")
    return fit


def fit_from_dict(cls: type, d: dict[str, Any]) -> "FittedSystem":
    """Rebuilds a fit from :func:`fit_to_dict`'s output (also after a JSON round trip)."""
    tag = d.get("format") if isinstance(d, dict) else None
    if isinstance(tag, str) and tag.startswith("blocksur.") and tag != FORMAT:
        # a dict of a development build (whose results class had another name, carried in
        # its tag): its layout may differ too, so it is refused rather than read
        raise InputError(
            f"this dict was saved by a development build of blocksur: its format tag is {tag!r}, "
            f"and this blocksur reads only {FORMAT!r} (the results class is now FittedSystem); "
            "refit the system and save the fit again with to_dict()"
        )
    if tag != FORMAT:
        raise InputError("not a blocksur fit dict: the 'format' entry is missing or different")
    if int(d.get("version", -1)) > VERSION:
        raise InputError(
            f"this fit dict has format version {d['version']}; this blocksur reads up to {VERSION}: upgrade blocksur"
        )

    labels = ("rows", "sample", "equations", "regressors", "restrictions")  # kept as written
    p = _plain({k: v for k, v in d.items() if k not in labels})
    rows = _index_from_json(d["rows"])
    xs = None if p.get("regressor_data") is None else [np.asfortranarray(x) for x in p["regressor_data"]]
    system = _RestoredSystem(d["equations"], d["regressors"], rows, np.asarray(p["dependent"], dtype=float),
                             xs, _sample_from_json(d.get("sample"), rows))
    plain = {k: p.get(k) for k in ("estimate", "core", "vcov", "vcov_error", "se", "resid", "options")}
    rs = d.get("restrictions")
    plain["restrictions"] = None if rs is None else {"r": _unarr(rs["r"]), "q": _unarr(rs["q"]), "texts": rs["texts"]}
    return _build(cls, plain, system)


# -- pickling --------------------------------------------------------------------------------------
def pickle_state(fit: "FittedSystem") -> dict[str, Any]:
    """The state pickled for a fit: its numbers (numpy arrays) and the system itself (its data
    and labels; the compiled objects are rebuilt on demand)."""
    d = _numbers(fit)
    d["system"] = fit._system
    return d


def restore_pickle(fit: "FittedSystem", state: dict[str, Any]) -> None:
    """Fills ``fit`` (created empty by pickle) from :func:`pickle_state`'s output."""
    if state.get("format") != FORMAT:
        raise InputError("not a pickled blocksur fit")
    new = _build(type(fit), state, state["system"])
    fit.__dict__.update(new.__dict__)
