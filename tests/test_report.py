"""Reports of a fit: plain text (width, content), HTML (well-formed, every coefficient), and the
Markdown and LaTeX coefficient tables; docstrings of the public names.

Outside references: the standard library's ``html.parser`` (tags balanced, cell values read
back as numbers and compared with the fit), Python's ``float`` parsing of the printed numbers,
and a pipe-table reading by splitting lines (the Markdown grammar of a table row)."""

from __future__ import annotations

import inspect
import math
import re
from html.parser import HTMLParser

import numpy as np
import pytest

import blocksur
from blocksur import _frame, _plots, _report, _tidy
from blocksur.scenarios import grid_load_table, random_system

VOID = {"br", "hr", "img", "input", "meta", "link", "wbr", "col"}


class _Reader(HTMLParser):
    """Checks nesting and collects the cells of each coefficient table."""

    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.stack: list[str] = []
        self.errors: list[str] = []
        self.tables: list[list[list[str]]] = []
        self.classes: list[str | None] = []
        self._cell: list[str] | None = None
        self._row: list[str] | None = None

    def handle_starttag(self, tag, attrs):
        if tag in VOID:
            return
        self.stack.append(tag)
        if tag == "table":
            self.tables.append([])
            self.classes.append(dict(attrs).get("class"))
        elif tag == "tr":
            self._row = []
        elif tag in ("td", "th"):
            self._cell = []

    def handle_endtag(self, tag):
        if tag in VOID:
            return
        if not self.stack or self.stack[-1] != tag:
            self.errors.append(f"</{tag}> closes <{self.stack[-1] if self.stack else None}>")
            return
        self.stack.pop()
        if tag in ("td", "th") and self._row is not None and self._cell is not None:
            self._row.append("".join(self._cell).strip())
            self._cell = None
        elif tag == "tr" and self._row is not None:
            self.tables[-1].append(self._row)
            self._row = None

    def handle_data(self, data):
        if self._cell is not None:
            self._cell.append(data)


def _fits():
    data = grid_load_table(n_districts=4, n_days=400, seed=8)
    system = blocksur.EquationSystem.from_table(data.frame, data.equations)
    return {
        "ifgls": system.fit("ifgls", restrictions="harbour::hdd_harbour = hillside::hdd_hillside"),
        "ols-t-hc1": system.fit("ols", covariance="hc1", inference="t"),
    }


FITS = _fits()


@pytest.mark.parametrize("key", list(FITS))
def test_html_is_well_formed_and_holds_every_coefficient(key):
    fit = FITS[key]
    page = fit._repr_html_()
    reader = _Reader()  # reference: the standard library's html.parser
    reader.feed(page)
    reader.close()
    assert reader.errors == [] and reader.stack == []
    coef_tables = [t for t, c in zip(reader.tables, reader.classes) if c == "coef"]
    assert len(coef_tables) == fit.n_eq
    for name, table in zip(fit.equation_names, coef_tables):
        header, rows = table[0], table[1:]
        assert header[:2] == ["regressor", "estimate"]
        got = {r[0]: float(r[1]) for r in rows}
        ref = fit.coef.loc[name]
        assert list(got) == list(ref.index)
        # printed with 6 significant digits: relative error below 5e-6
        np.testing.assert_allclose(list(got.values()), ref.to_numpy(), rtol=5e-6, atol=0)
        se = [float(r[2]) for r in rows]
        np.testing.assert_allclose(se, fit.se.loc[name].to_numpy(), rtol=5e-5, atol=0)
    text = re.sub(r"<[^>]+>", " ", page)
    for phrase in ("not causal", "assumptions", "Breusch-Pagan LM", "Residual correlations"):
        assert phrase in text


def test_html_escapes_names():
    data = random_system(2, 50, seed=1)
    eqs = {"a<b & c": data.equations["eq0"], "d": data.equations["eq1"]}
    page = blocksur.EquationSystem(eqs).fit("fgls").report_html()
    reader = _Reader()
    reader.feed(page)
    assert reader.errors == [] and reader.stack == []
    assert "a&lt;b &amp; c" in page and "a<b" not in page


@pytest.mark.parametrize("key", list(FITS))
def test_text_report_fits_100_columns_and_has_every_part(key):
    fit = FITS[key]
    text = fit.report()
    assert str(fit) == text
    lines = text.splitlines()
    assert max(len(ln) for ln in lines) <= 100
    for label in ("estimator", "sample", "Omega", "covariance", "coefficients", "log-likelihood",
                  "McElroy R-squared", "Omega diagonal?", "Residual correlations"):
        assert label in text, label
    assert "rows dropped" in text and "not causal" in text
    if fit.method == "ifgls":
        assert f"converged after {fit.n_iter} GLS steps" in " ".join(text.split())
        assert "harbour::hdd_harbour = hillside::hdd_hillside" in text
    # every coefficient's estimate printed on its regressor's line (read back with float)
    for (eq, reg), value in fit.coef.items():
        block = text.split(f"] {eq}  --", 1)[1]
        line = next(ln for ln in block.splitlines() if ln.strip().startswith(reg + " "))
        assert math.isclose(float(line.split()[1]), value, rel_tol=5e-6)


def test_text_report_stays_narrow_with_long_names_and_many_equations():
    data = random_system(30, 60, k=2, seed=3)
    long = {f"equation_with_a_very_long_descriptive_name_{i}": (y, X.rename(columns=lambda c: c + "_" * 40))
            for i, (y, X) in enumerate(data.equations.values())}
    fit = blocksur.EquationSystem(long).fit("fgls")
    text = fit.report(max_equations=3)
    assert max(len(ln) for ln in text.splitlines()) <= 100
    assert "27 more equations not shown" in text
    assert "435 pairs" in text  # the correlation summary replaces the matrix for large N
    wide = fit.report(width=120)
    assert max(len(ln) for ln in wide.splitlines()) <= 120


def test_markdown_table_reads_back():
    fit = FITS["ifgls"]
    md = fit.to_markdown(digits=5)
    title, blank, *lines = md.strip().splitlines()  # the title is checked below
    assert blank == "" and fit.to_markdown(digits=5, caption="") == "\n".join(lines) + "\n"
    # reference: a pipe table row is "| cell | cell |"; the second line is the alignment row
    cells = [[c.strip() for c in ln.strip().strip("|").split("|")] for ln in lines]
    assert cells[0][:3] == ["equation", "regressor", "estimate"]
    assert all(re.fullmatch(r":?-{3,}:?", c) for c in cells[1])
    assert len(lines) == 2 + fit.n_coef and all(len(c) == 8 for c in cells)
    got = np.array([float(c[2]) for c in cells[2:]])
    np.testing.assert_allclose(got, fit.coef.to_numpy(), rtol=5e-6, atol=0)


class _Headings(HTMLParser):
    """The text of each <h1>..<h6> element."""

    def __init__(self):
        super().__init__(convert_charrefs=True)
        self.found: list[str] = []
        self._open = False

    def handle_starttag(self, tag, attrs):
        if re.fullmatch(r"h[1-6]", tag):
            self._open = True
            self.found.append("")

    def handle_endtag(self, tag):
        if re.fullmatch(r"h[1-6]", tag):
            self._open = False

    def handle_data(self, data):
        if self._open:
            self.found[-1] += data


@pytest.mark.parametrize("key", list(FITS))
def test_every_report_format_opens_with_a_blocksur_title(key):
    """The title is blocksur's own: "blocksur", the size of the system and the estimator in
    words, the same in the text, HTML, Markdown and LaTeX outputs (the last two by default)."""
    fit = FITS[key]
    words = {"ols": "OLS", "fgls": "two-step FGLS", "ifgls": "iterated FGLS"}[fit.method]
    expected = f"blocksur · {fit.n_eq} equations × {fit.n_obs} rows · {words}"
    text = fit.report()
    assert text.splitlines()[0] == expected
    headings = _Headings()  # reference: the standard library's html.parser
    headings.feed(fit.report_html())
    assert headings.found[0] == expected
    assert fit.to_markdown().splitlines()[0] == expected
    tex = fit.to_latex()
    caption = next(ln for ln in tex.splitlines() if ln.startswith(r"\caption{"))
    assert caption == r"\caption{" + expected.replace("·", r"$\cdot$").replace("×", r"$\times$") + "}"
    # the caption options replace the title; "" drops it
    assert r"\caption{Load}" in fit.to_latex(caption="Load") and r"\caption" not in fit.to_latex(caption="")
    for out in (text, fit.report_html(), fit.to_markdown(), tex):
        assert "SUR system" not in out and "system fit" not in out


def test_title_counts_in_words():
    data = random_system(1, 40, seed=2)
    fit = blocksur.EquationSystem(data.equations).fit("fgls")
    assert _report.title(fit) == "blocksur · 1 equation × 40 rows · two-step FGLS"


def test_latex_table_is_balanced_and_escaped():
    fit = FITS["ifgls"]
    tex = fit.to_latex(caption="Daily load & weather", label="tab:load")
    assert tex.count("{") - tex.count(r"\{") == tex.count("}") - tex.count(r"\}")
    assert tex.count(r"\begin{") == tex.count(r"\end{") == 2
    assert r"hdd\_harbour" in tex and r"Daily load \& weather" in tex
    body = [ln for ln in tex.splitlines() if ln.endswith(r"\\") and "Regressor" not in ln]
    assert len(body) == fit.n_coef
    assert all(ln.count("&") - ln.count(r"\&") == 6 for ln in body)


def test_format_number():
    f = _report.format_number
    assert f(142.764367) == "142.764" and f(-0.5) == "-0.500000" and f(0) == "0"
    assert f(1.5e9) == "1.5000e+09" and f(float("nan")) == "nan" and f(float("-inf")) == "-inf"
    # reference: Python's float parsing of what is printed
    for x in (3.14159265, -2.5e-7, 123456.789, 9.99999e6):
        assert math.isclose(float(f(x)), x, rel_tol=1e-5)


@pytest.mark.parametrize("module", [_frame, _tidy, _report, _plots])
def test_public_names_have_docstrings(module):
    assert module.__doc__ and "Example" in module.__doc__
    for name in module.__all__:
        obj = getattr(module, name)
        assert inspect.getdoc(obj), f"{module.__name__}.{name} has no docstring"


def test_fit_methods_have_docstrings_with_examples():
    for name in ("long_table", "wide_table", "equation_stats", "forecast_table", "to_dict", "from_dict",
                 "report", "report_html", "to_markdown", "to_latex", "plot_resid_corr", "plot_coef",
                 "plot_convergence"):
        doc = inspect.getdoc(getattr(blocksur.FittedSystem, name))
        assert doc and "Example" in doc, name
    assert "Example" in inspect.getdoc(blocksur.EquationSystem.from_table)
    assert inspect.getdoc(blocksur.SampleInfo)


def test_stubs_cover_the_compiled_module():
    import ast
    import pathlib

    from blocksur import _core

    stub = pathlib.Path(_core.__file__).with_name("_core.pyi")
    tree = ast.parse(stub.read_text())  # reference: the stdlib parser reads the stub file
    declared = {n.name for n in tree.body if isinstance(n, (ast.FunctionDef, ast.ClassDef))}
    declared |= {t.id for n in tree.body if isinstance(n, ast.AnnAssign) for t in [n.target]}
    compiled = {n for n in dir(_core) if not n.startswith("_")} | {"__version__"}
    assert compiled - declared == set()
    classes = {n.name: n for n in tree.body if isinstance(n, ast.ClassDef)}
    for cls in ("Prepared", "Estimate"):
        members = {m.name for m in classes[cls].body if isinstance(m, ast.FunctionDef)}
        real = {m for m in dir(getattr(_core, cls)) if not m.startswith("_")}
        assert real - members == set(), cls
    assert (stub.parent / "py.typed").exists()


def test_report_names_shrinkage_and_the_matrix_free_solver():
    data = random_system(6, 80, seed=12)
    system = blocksur.EquationSystem(data.equations)
    lw = system.fit("fgls", omega="ledoit-wolf")
    text = " ".join(lw.report().split())
    assert f"Ledoit-Wolf, intensity {lw.shrinkage:.3f}" in text
    cg = system.fit("ifgls", solver="cg")
    text = " ".join(cg.report().split())
    assert "matrix-free conjugate gradients" in text and f"{sum(cg.cg_iterations)} iterations" in text
