"""Reports of a fit: plain text for terminals and logs, HTML for Jupyter, and the coefficient
table as Markdown or LaTeX.

The layout is blocksur's own: a title (``blocksur · 3 equations × 365 rows · iterated FGLS``,
which also opens the HTML report and, by default, the Markdown and LaTeX tables), a header that says how the estimate was made (estimator and
its convergence, the sample and the rows dropped, how Omega was scaled, the kind of covariance
and reference distribution, the restrictions), one block per equation (its fit line, then one
row per regressor with the estimate, its standard error, the test statistic, the p-value and
the interval), the residual correlations across equations, the system-wide statistics, and a
closing note on how to read the numbers.

Example
-------
>>> import blocksur
>>> from blocksur.scenarios import random_system
>>> fit = blocksur.EquationSystem(random_system(2, 60, seed=4).equations).fit("ifgls")
>>> text = fit.report()
>>> max(len(line) for line in text.splitlines()) <= 100
True
"""

from __future__ import annotations

import html
import math
import textwrap
from typing import TYPE_CHECKING, Any

import numpy as np

if TYPE_CHECKING:  # pragma: no cover
    from ._fit import FittedSystem

__all__ = ["title", "text_report", "html_report", "markdown_table", "latex_table", "format_number"]

CAUTION = (
    "How to read this: the estimates rest on the model's assumptions (linear equations, errors "
    "with mean zero given the regressors, one error covariance Omega shared by all rows{robust}). "
    "They describe associations in this sample, not causal effects. Check the diagnostics "
    "(residual plots, the correlations above, the tests) before relying on them."
)

_METHOD_SHORT = {"ols": "OLS", "fgls": "two-step FGLS", "ifgls": "iterated FGLS"}
_METHOD = {
    "ols": "OLS, each equation on its own",
    "fgls": "two-step FGLS (Omega from OLS residuals, then one GLS step)",
    "ifgls": "iterated FGLS (Omega and GLS alternated to a fixed point)",
}
_DIVISOR = {
    "ml": "residual cross-products divided by T (maximum-likelihood scaling)",
    "dof": "residual cross-products S_ij divided by sqrt((T - K_i)(T - K_j))",
}
_COVARIANCE = {
    "classical": "classical (model-based)",
    "hc0": "HC0, robust to heteroskedasticity across rows",
    "hc1": "HC1, robust to heteroskedasticity across rows (HC0 x T / (T - K/N))",
}


# -- numbers -------------------------------------------------------------------------------------
def format_number(x: Any, sig: int = 6) -> str:
    """A number with ``sig`` significant digits, fixed-point between 1e-4 and 1e7, scientific
    outside; ``nan``/``inf`` spelled out.

    Example
    -------
    >>> format_number(142.764367), format_number(-0.000012345678), format_number(0)
    ('142.764', '-1.2346e-05', '0')
    """
    if x is None:
        return "n/a"
    x = float(x)
    if math.isnan(x):
        return "nan"
    if math.isinf(x):
        return "inf" if x > 0 else "-inf"
    if x == 0:
        return "0"
    ax = abs(x)
    if 1e-4 <= ax < 1e7:
        dec = min(max(0, sig - 1 - math.floor(math.log10(ax))), 9)
        return f"{x:.{dec}f}"
    return f"{x:.{max(sig - 2, 1)}e}"


def _p(p: float) -> str:
    if not math.isfinite(p):
        return "nan"
    return "< 0.0001" if p < 1e-4 else f"{p:.4f}"


def _cut(text: str, n: int) -> str:
    return text if len(text) <= n else text[: max(n - 2, 1)] + ".."


def _level(level: float) -> str:
    return f"{100 * level:g}%"


# Narrowest text report: the coefficient rows take 72 columns besides the regressor name, which
# gets at least 8; the widest is generous (a wider request is a mistake, and each rule line costs it).
MIN_WIDTH = 80
MAX_WIDTH = 1000
MAX_DIGITS = 15


def _whole(name: str, value: Any, low: int, high: int | None = None, allow_none: bool = False,
           none_means: str = "") -> int | None:
    """A whole-number option in [low, high], or None where allowed; InvalidOptionError otherwise."""
    from .errors import InvalidOptionError

    if value is None and allow_none:
        return None
    ok = isinstance(value, (int, np.integer)) and not isinstance(value, (bool, np.bool_))
    if not ok or value < low or (high is not None and value > high):
        allowed = f"from {low} to {high}" if high is not None else f">= {low}"
        extra = f", or None {none_means}" if allow_none else ""
        raise InvalidOptionError(f"{name} must be a whole number {allowed}{extra}; got {value!r}")
    return int(value)


def _check_level(level: Any) -> None:
    from ._fit import check_level

    check_level(level)


# -- the facts a report shows (shared by text and HTML) ----------------------------------------------
def _count(n: int, what: str) -> str:
    return f"{n} {what}" + ("" if n == 1 else "s")


def title(fit: "FittedSystem") -> str:
    """The title of every report of ``fit``: blocksur, the size of the system and the
    estimator, e.g. ``"blocksur · 3 equations × 365 rows · iterated FGLS"``."""
    method = _METHOD_SHORT.get(fit.method, fit.method)
    return f"blocksur · {_count(fit.n_eq, 'equation')} × {_count(fit.n_obs, 'row')} · {method}"


def _header(fit: "FittedSystem", level: float) -> list[tuple[str, str]]:
    rows = []
    est = _METHOD.get(fit.method, fit.method)
    if fit.method == "ifgls":
        path = fit.criterion_path
        last = f"{path[-1]:.2g}" if len(path) else "n/a"
        if fit.converged:
            est += f"; converged after {fit.n_iter} GLS steps (last relative change {last} <= tol {fit.tol:g})"
        else:
            est += (f"; NOT converged: stopped at max_iter = {fit.max_iter} GLS steps "
                    f"(last relative change {last} > tol {fit.tol:g})")
    rows.append(("estimator", est))
    sample = f"T = {fit.n_obs} rows in each of N = {fit.n_eq} equations"
    info = getattr(fit._system, "_sample", None)
    if info is not None:
        sample += "; " + info.describe()
    rows.append(("sample", sample))
    divisor = fit.omega_divisor
    if divisor == "ledoit-wolf":
        target = getattr(fit, "shrink_target", None) or "target"
        amount = getattr(fit, "shrinkage", None)
        how = f"intensity {amount:.3f}" if amount is not None else "estimated intensity"
        rows.append(("Omega", f"residual covariance shrunk toward its {target} (Ledoit-Wolf, {how})"))
    else:
        rows.append(("Omega", _DIVISOR.get(divisor, divisor)))
    if getattr(fit, "solver", "direct") == "cg":
        its = list(getattr(fit, "cg_iterations", []))
        rows.append(("solver", "matrix-free conjugate gradients"
                     + (f" ({sum(its)} iterations over {len(its)} GLS steps)" if its else "")))
    dist = "z (standard normal)" if fit.inference == "z" else "t (T - K_i degrees of freedom)"
    rows.append(("covariance", f"{_COVARIANCE.get(fit.covariance, fit.covariance)}; {dist} tests; "
                 f"{_level(level)} intervals"))
    free = fit.n_coef - fit.n_restrictions
    rows.append(("coefficients", f"K = {fit.n_coef} in all, {free} free after {fit.n_restrictions} restrictions"))
    if fit.restrictions is not None:
        rows.append(("restrictions", "; ".join(fit.restrictions.texts)))
    return rows


def _equation_line(fit: "FittedSystem", i: int, stats: Any) -> str:
    name = fit.equation_names[i]
    s = stats.iloc[i]
    return (f"{int(s['n_regressors'])} regressors | R-squared {s['r2']:.4f} (adjusted {s['r2_adj']:.4f}) | "
            f"residual s.e. {format_number(s['resid_se'], 5)}"), name


def _system_rows(fit: "FittedSystem") -> list[tuple[str, str]]:
    rows = []
    ll = fit.loglik
    if math.isfinite(ll):
        rows.append(("log-likelihood", f"{format_number(ll, 8)}  (AIC {format_number(fit.aic, 8)}, "
                                       f"BIC {format_number(fit.bic, 8)}, {fit.n_params} parameters)"))
    else:
        rows.append(("log-likelihood", "not finite: the residual covariance is singular"))
    try:
        rows.append(("McElroy R-squared", f"{fit.mcelroy_r2:.4f} (all equations together, weighted by the "
                                          "inverse of Omega)"))
    except np.linalg.LinAlgError:
        rows.append(("McElroy R-squared", "not available: Omega is singular"))
    if fit.n_eq >= 2:
        t = fit.omega_diagonal_lm()
        verdict = ("the equations' errors are correlated: a system estimator can gain over OLS"
                   if t.rejects() else "no evidence of correlation across equations at the 5% level")
        p = "p < 0.0001" if t.pvalue < 1e-4 else f"p = {t.pvalue:.4f}"
        rows.append(("Omega diagonal?", f"Breusch-Pagan LM chi2({t.df:g}) = {format_number(t.statistic, 6)}, "
                                        f"{p}: {verdict}"))
    return rows


def _corr_summary(fit: "FittedSystem", top: int = 3) -> str:
    r = fit.resid_corr.to_numpy()
    names = fit.equation_names
    iu = np.triu_indices(len(names), 1)
    vals = r[iu]
    order = np.argsort(-np.abs(vals))[:top]
    pairs = ", ".join(f"{names[iu[0][k]]}~{names[iu[1][k]]} {vals[k]:+.2f}" for k in order)
    return (f"{len(vals)} pairs: median {np.median(vals):+.2f}, range [{vals.min():+.2f}, "
            f"{vals.max():+.2f}], mean |r| {np.mean(np.abs(vals)):.2f}; strongest: {pairs}")


def _coef_table(fit: "FittedSystem", level: float) -> tuple[Any, str | None]:
    """The coefficient table, or the estimates alone (NaN elsewhere) with a note when the
    standard errors are not available (matrix-free path beyond its limit)."""
    from .errors import BlocksurError

    try:
        return fit.coef_table(level), None
    except BlocksurError as err:
        t = fit.coef.to_frame("estimate")
        for col in ("se", "stat", "pval", "lower", "upper"):
            t[col] = np.nan
        return t, f"standard errors not computed: {err}"


def _caution(fit: "FittedSystem") -> str:
    robust = "" if fit.covariance == "classical" else "; the robust covariance relaxes this for the standard errors"
    return CAUTION.format(robust=robust)


# -- plain text ------------------------------------------------------------------------------------
def text_report(fit: "FittedSystem", level: float = 0.95, max_equations: int | None = 12, width: int = 100,
                max_corr: int = 8) -> str:
    """The fit as plain text, no line longer than ``width`` (80 to 1000) characters;
    ``max_equations=None`` shows every equation."""
    _check_level(level)
    width = _whole("width", width, MIN_WIDTH, MAX_WIDTH)
    max_equations = _whole("max_equations", max_equations, 1, allow_none=True, none_means="for all equations")
    max_corr = _whole("max_corr", max_corr, 1)
    if max_equations is None:
        max_equations = fit.n_eq
    out: list[str] = []
    wrap_label = 15

    def kv(label: str, value: str) -> None:
        lines = textwrap.wrap(value, width=width - wrap_label - 2) or [""]
        out.append(f"  {label:<{wrap_label - 2}}{lines[0]}")
        out.extend(" " * wrap_label + ln for ln in lines[1:])

    out.append(title(fit))
    out.append("=" * width)
    for label, value in _header(fit, level):
        kv(label, value)

    table, missing = _coef_table(fit, level)
    if missing:
        kv("note", missing)
    stats = fit.equation_stats()
    shown = min(fit.n_eq, max_equations)
    stat_name = "z" if fit.inference == "z" else "t"
    reg_w = width - 2 - 12 - 11 - 9 - 10 - 28
    head = (f"  {'regressor':<{reg_w}}{'estimate':>12}{'s.e.':>11}{stat_name:>9}{'p-value':>10}"
            f"  {_level(level) + ' interval':<26}")
    for i in range(shown):
        line, name = _equation_line(fit, i, stats)
        out.append("")
        tag = f"[{i + 1}/{fit.n_eq}] "
        lead = tag + _cut(name, width - len(tag) - len(line) - 4)
        out.append(f"{lead}  --  {line}" if len(lead) + len(line) + 6 <= width else lead)
        if len(lead) + len(line) + 6 > width:
            out.append(" " * len(tag) + line)
        out.append(head.rstrip())
        block = table.loc[name]
        for reg, row in block.iterrows():
            interval = f"[{format_number(row['lower'], 5)}, {format_number(row['upper'], 5)}]"
            out.append(
                (f"  {_cut(str(reg), reg_w - 1):<{reg_w}}{format_number(row['estimate']):>12}"
                 f"{format_number(row['se'], 5):>11}{format_number(row['stat'], 4):>9}{_p(row['pval']):>10}"
                 f"  {interval}").rstrip()
            )
    if shown < fit.n_eq:
        out.append("")
        out.append(f"... {fit.n_eq - shown} more equations not shown (all coefficients: fit.long_table())")

    if fit.n_eq >= 2:
        out.append("")
        out.append("Residual correlations across equations")
        if fit.n_eq <= max_corr:
            names = fit.equation_names
            r = fit.resid_corr.to_numpy()
            lab_w = min(max(len(n) for n in names), 16) + 2
            col_w = max(8, min(11, (width - lab_w - 2) // max(fit.n_eq - 1, 1)))
            out.append(" " * (lab_w + 2) + "".join(f"{_cut(n, col_w - 1):>{col_w}}" for n in names[:-1]))
            for a in range(1, fit.n_eq):
                cells = "".join(f"{r[a, b]:>{col_w}.2f}" for b in range(a))
                out.append(f"  {_cut(names[a], lab_w - 1):<{lab_w}}{cells}")
        else:
            for ln in textwrap.wrap(_corr_summary(fit), width=width - 2):
                out.append("  " + ln)

    out.append("")
    out.append("System")
    for label, value in _system_rows(fit):
        wrap_label = 21
        kv(label, value)
    out.append("-" * width)
    out.extend(textwrap.wrap(_caution(fit), width=width))
    return "\n".join(out)


# -- HTML ---------------------------------------------------------------------------------------------
_STYLE = (
    ".bsr{font-family:system-ui,sans-serif;font-size:13px;max-width:60em}"
    ".bsr table{border-collapse:collapse;margin:.3em 0 .8em 0}"
    ".bsr th,.bsr td{padding:2px 8px;text-align:right}"
    ".bsr th.l,.bsr td.l{text-align:left}"
    ".bsr .head th{text-align:left;color:#555;font-weight:normal;padding-right:1.2em;vertical-align:top}"
    ".bsr .head td{text-align:left}"
    ".bsr .coef thead th{border-bottom:1px solid #888}"
    ".bsr summary{cursor:pointer;margin:.4em 0}"
    ".bsr .note{color:#444;font-size:12px;border-top:1px solid #bbb;padding-top:.4em}"
    ".bsr h4{margin:.8em 0 .2em 0}"
)


def _e(x: Any) -> str:
    return html.escape(str(x), quote=True)


def _corr_color(v: float) -> str:
    a = min(abs(v), 1.0) * 0.75
    rgb = "200,60,40" if v > 0 else "40,90,200"
    return f"background:rgba({rgb},{a:.2f})"


def html_report(fit: "FittedSystem", level: float = 0.95, max_equations: int | None = 12,
                max_corr: int = 15) -> str:
    """The fit as one well-formed HTML fragment (every tag closed, text escaped);
    ``max_equations=None`` shows every equation."""
    _check_level(level)
    max_equations = _whole("max_equations", max_equations, 1, allow_none=True, none_means="for all equations")
    max_corr = _whole("max_corr", max_corr, 1)
    if max_equations is None:
        max_equations = fit.n_eq
    h: list[str] = [f'<div class="bsr"><style>{_STYLE}</style>']
    h.append(f"<h4>{_e(title(fit))}</h4>")
    h.append('<table class="head"><tbody>')
    for label, value in _header(fit, level):
        h.append(f"<tr><th>{_e(label)}</th><td>{_e(value)}</td></tr>")
    h.append("</tbody></table>")

    table, missing = _coef_table(fit, level)
    if missing:
        h.append(f"<p>{_e(missing)}</p>")
    stats = fit.equation_stats()
    stat_name = "z" if fit.inference == "z" else "t"
    shown = min(fit.n_eq, max_equations)
    for i in range(shown):
        line, name = _equation_line(fit, i, stats)
        opened = " open" if shown <= 6 else ""
        h.append(f"<details{opened}><summary><b>{_e(name)}</b> &middot; {_e(line)}</summary>")
        h.append('<table class="coef"><thead><tr><th class="l">regressor</th><th>estimate</th><th>s.e.</th>'
                 f"<th>{stat_name}</th><th>p-value</th><th>{_e(_level(level))} interval</th></tr></thead><tbody>")
        for reg, row in table.loc[name].iterrows():
            h.append(
                f'<tr><td class="l">{_e(reg)}</td><td>{_e(format_number(row["estimate"]))}</td>'
                f"<td>{_e(format_number(row['se'], 5))}</td><td>{_e(format_number(row['stat'], 4))}</td>"
                f"<td>{_e(_p(row['pval']))}</td>"
                f"<td>[{_e(format_number(row['lower'], 5))}, {_e(format_number(row['upper'], 5))}]</td></tr>"
            )
        h.append("</tbody></table></details>")
    if shown < fit.n_eq:
        h.append(f"<p>&hellip; {fit.n_eq - shown} more equations not shown (all coefficients: "
                 "<code>fit.long_table()</code>)</p>")

    if fit.n_eq >= 2:
        h.append("<h4>Residual correlations across equations</h4>")
        if fit.n_eq <= max_corr:
            names = fit.equation_names
            r = fit.resid_corr.to_numpy()
            h.append('<table class="corr"><thead><tr><th></th>')
            h.extend(f"<th>{_e(n)}</th>" for n in names[:-1])
            h.append("</tr></thead><tbody>")
            for a in range(1, fit.n_eq):
                h.append(f'<tr><th class="l">{_e(names[a])}</th>')
                for b in range(fit.n_eq - 1):
                    if b < a:
                        h.append(f'<td style="{_corr_color(r[a, b])}">{r[a, b]:.2f}</td>')
                    else:
                        h.append("<td></td>")
                h.append("</tr>")
            h.append("</tbody></table>")
        else:
            h.append(f"<p>{_e(_corr_summary(fit))}</p>")

    h.append('<h4>System</h4><table class="head"><tbody>')
    for label, value in _system_rows(fit):
        h.append(f"<tr><th>{_e(label)}</th><td>{_e(value)}</td></tr>")
    h.append("</tbody></table>")
    h.append(f'<p class="note">{_e(_caution(fit))}</p></div>')
    return "".join(h)


# -- Markdown and LaTeX -----------------------------------------------------------------------------
def _rows(fit: "FittedSystem", level: float, digits: int) -> list[list[str]]:
    _check_level(level)
    digits = _whole("digits (significant digits shown)", digits, 1, MAX_DIGITS)
    t = fit.coef_table(level)
    out = []
    for (eq, reg), row in t.iterrows():
        out.append([
            str(eq), str(reg), format_number(row["estimate"], digits + 1), format_number(row["se"], digits),
            format_number(row["stat"], digits), _p(row["pval"]),
            format_number(row["lower"], digits), format_number(row["upper"], digits),
        ])
    return out


def _caption(caption: Any) -> None:
    from .errors import InvalidOptionError

    if caption is not None and not isinstance(caption, str):
        raise InvalidOptionError(f"caption must be a string or None, got {type(caption).__name__}")


def markdown_table(fit: "FittedSystem", level: float = 0.95, digits: int = 4, caption: str | None = None) -> str:
    """The coefficient table as a Markdown pipe table (one row per coefficient), after a line
    with ``caption``: by default the report's :func:`title`; ``""`` for the table alone."""
    _caption(caption)
    rows = _rows(fit, level, digits)
    stat = "z" if fit.inference == "z" else "t"
    lv = _level(level)
    head = ["equation", "regressor", "estimate", "s.e.", stat, "p-value", f"{lv} lower", f"{lv} upper"]

    def cell(s: str) -> str:
        return s.replace("\\", "\\\\").replace("|", "\\|")

    lines = ["| " + " | ".join(head) + " |", "|" + "|".join([":---", ":---"] + ["---:"] * 6) + "|"]
    for row in rows:
        lines.append("| " + " | ".join(cell(c) for c in row) + " |")
    caption = title(fit) if caption is None else caption
    if caption:
        lines = [caption, ""] + lines
    return "\n".join(lines) + "\n"


_TEX = {"\\": r"\textbackslash{}", "&": r"\&", "%": r"\%", "$": r"\$", "#": r"\#", "_": r"\_",
        "{": r"\{", "}": r"\}", "~": r"\textasciitilde{}", "^": r"\textasciicircum{}",
        "<": r"\textless{}", ">": r"\textgreater{}", "·": r"$\cdot$", "×": r"$\times$"}


def _tex(s: str) -> str:
    return "".join(_TEX.get(ch, ch) for ch in s)


def latex_table(fit: "FittedSystem", level: float = 0.95, digits: int = 4, caption: str | None = None,
                label: str | None = None) -> str:
    """The coefficient table as a LaTeX ``table`` (needs ``\\usepackage{booktabs}``), captioned
    ``caption``: by default the report's :func:`title`; ``""`` for no caption."""
    from .errors import InvalidOptionError

    _caption(caption)
    if label is not None and not isinstance(label, str):
        raise InvalidOptionError(f"label must be a string or None, got {type(label).__name__}")
    rows = _rows(fit, level, digits)
    caption = title(fit) if caption is None else caption
    stat = "$z$" if fit.inference == "z" else "$t$"
    lv = _tex(_level(level))
    out = [r"\begin{table}[htbp]", r"\centering"]
    if caption:
        out.append(r"\caption{" + _tex(caption) + "}")
    if label:
        out.append(r"\label{" + label.replace("}", "") + "}")
    out += [r"\begin{tabular}{llrrrrl}", r"\toprule",
            rf"Equation & Regressor & Estimate & S.E. & {stat} & $p$-value & {lv} interval \\", r"\midrule"]
    prev = None
    for eq, reg, est, se, st, p, lo, hi in rows:
        if prev is not None and eq != prev:
            out.append(r"\addlinespace")
        first = _tex(eq) if eq != prev else ""
        out.append(f"{first} & {_tex(reg)} & {est} & {se} & {st} & {_tex(p)} & [{lo}, {hi}] \\\\")
        prev = eq
    out += [r"\bottomrule", r"\end{tabular}", r"\end{table}"]
    return "\n".join(out) + "\n"
