"""Linear restrictions across equations: a small readable syntax, and arrays.

Syntax
------
A coefficient is written ``equation::regressor``: the equation's name, two colons, the
regressor's name. A restriction is ``expression = expression``, each side a sum of terms
``[number [*]] coefficient``, ``coefficient [* number]``, ``coefficient / number`` or a plain
number. Several restrictions are separated by ``;`` or new lines, or given as a list of strings.

Quoting: a name made of letters, digits and underscores (not starting with a digit) is written
as it is. Any other name (with spaces, brackets, dots, colons, signs...) goes between backticks,
and a backtick inside such a name is written twice.

Examples::

    north::price = south::price                 # equal price effects in two regions
    food::income + fuel::income + other::income = 0
    2 * north::income - south::income = 0.5; north::weekend = 0
    `north zone`::`log(price)` = 2 * south::`log(price)`    # equation "north zone"
    harbour::`C(day_type)[T.sunday]` = 0        # a term of a formula
    south::`a``b` = 1                           # the regressor named a`b

A coefficient written ``equation.regressor`` raises a
:class:`~blocksur.errors.RestrictionSyntaxError` whose message shows the restriction rewritten
with ``::``.

Arrays are accepted too: ``(R, q)`` with ``R`` of shape (m, K) over the order of
``FittedSystem.coef`` and ``q`` of length m.
"""

from __future__ import annotations

import re
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from .errors import RestrictionError, RestrictionSyntaxError

__all__ = ["parse_restrictions", "RestrictionSet", "coefficient_text"]

SEPARATOR = "::"

# '.' is an operator only to recognise the earlier form equation.regressor and say how to
# write it now; a quoted name is `...`, with `` for a backtick inside it
_TOKEN = re.compile(
    r"""
    (?P<space>[ \t\r]+)
  | (?P<number>(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?)
  | (?P<name>[A-Za-z_][A-Za-z0-9_]*)
  | (?P<quoted>`(?:[^`]|``)*`)
  | (?P<op>::|[-+*/=.])
  """,
    re.VERBOSE,
)
_BARE = re.compile(r"[A-Za-z_][A-Za-z0-9_]*")


def quote_name(name: str) -> str:
    """A name as a restriction writes it: bare if it is made of letters, digits and
    underscores (not starting with a digit), else between backticks with each backtick doubled."""
    return name if _BARE.fullmatch(name) else "`" + name.replace("`", "``") + "`"


def coefficient_text(equation: str, regressor: str) -> str:
    """How a restriction names a coefficient: ``equation::regressor``, quoted where needed.

    Example
    -------
    >>> coefficient_text("north", "log(price)")
    'north::`log(price)`'
    """
    return quote_name(equation) + SEPARATOR + quote_name(regressor)


def with_separator(text: str) -> str:
    """``text`` with each '.' that follows a name (the earlier form equation.regressor)
    replaced by '::'; everything else, unreadable characters included, left as it is."""
    out: list[str] = []
    last = None  # kind of the last token that is not a space
    pos = 0
    while pos < len(text):
        m = _TOKEN.match(text, pos)
        if m is None:
            out.append(text[pos])
            last = "other"
            pos += 1
            continue
        kind, val = m.lastgroup, m.group()
        if kind == "op" and val == "." and last in ("name", "quoted"):
            val = SEPARATOR
        out.append(val)
        if kind != "space":
            last = kind
        pos = m.end()
    return "".join(out)


@dataclass(frozen=True)
class RestrictionSet:
    """Restrictions R b = q over the stacked coefficients, with their source texts."""

    r: np.ndarray
    q: np.ndarray
    texts: tuple[str, ...]

    def __len__(self) -> int:
        return len(self.q)

    def describe(self, index: int | None) -> str:
        if index is None or not (0 <= index < len(self.texts)):
            return ""
        return f"restriction {index} ({self.texts[index]!r})"


def _split(spec: str | Sequence[str]) -> list[tuple[str, str]]:
    """The restrictions, each with the string the user gave it in (for messages)."""
    items = [spec] if isinstance(spec, str) else list(spec)
    out: list[tuple[str, str]] = []
    for item in items:
        if not isinstance(item, str):
            raise RestrictionError(f"a restriction must be a string, not {type(item).__name__}")
        out.extend((part, item) for part in re.split(r"[;\n]", item) if part.strip())
    return out


class _Parser:
    def __init__(self, text: str, coef_pos: dict[tuple[str, str], int], regressors: dict[str, list[str]],
                 source: str | None = None):
        self.text = text
        self.source = text if source is None else source.strip()
        self.coef_pos = coef_pos
        self.regressors = regressors
        self.tokens: list[tuple[str, str, int]] = []
        pos = 0
        while pos < len(text):
            m = _TOKEN.match(text, pos)
            if m is None:
                ch = text[pos]
                if ch == "`":
                    self.fail(pos, "a backtick opens a quoted name that is not closed (a quoted name ends "
                                   "with a second backtick; a backtick inside it is written twice)")
                if ch == ":":
                    if text[pos + 2 : pos + 3] == ":":  # something between the two colons
                        self.fail(pos + 1, f"unexpected character {text[pos + 1]!r} inside '::'")
                    self.fail(pos, "a single ':' (a coefficient is written equation::regressor, with two colons)")
                self.fail(pos, f"unexpected character {ch!r}")
            kind = m.lastgroup
            if kind != "space":
                self.tokens.append((kind, m.group(), pos))
            pos = m.end()
        self.tokens.append(("end", "", len(text)))
        self.i = 0

    def fail(self, pos: int, msg: str) -> None:
        pointer = " " * pos + "^"
        raise RestrictionSyntaxError(
            f"{msg} at position {pos}:\n  {self.text}\n  {pointer}", text=self.text, position=pos
        )

    def peek(self) -> tuple[str, str, int]:
        return self.tokens[self.i]

    def take(self) -> tuple[str, str, int]:
        tok = self.tokens[self.i]
        self.i += 1
        return tok

    def name(self) -> tuple[str, int]:
        kind, val, pos = self.take()
        if kind == "name":
            return val, pos
        if kind == "quoted":
            return val[1:-1].replace("``", "`"), pos
        self.fail(pos, f"expected a name, found {val!r}" if val else "expected a name, found the end")
        raise AssertionError  # unreachable

    def coefficient(self) -> int:
        eq, pos = self.name()
        kind, val, dpos = self.peek()
        if kind == "op" and val == ".":
            self.fail(dpos, "a coefficient is written equation::regressor, not equation.regressor: "
                            f"write {with_separator(self.source)!r}; found '.'")
        if val != SEPARATOR:
            self.fail(dpos, f"expected '::' after equation name {eq!r} (a coefficient is written "
                            "equation::regressor)")
        self.take()
        reg, rpos = self.name()
        if eq not in self.regressors:
            self.fail(pos, f"unknown equation {eq!r}; the equations are {sorted(self.regressors)}")
        if (eq, reg) not in self.coef_pos:
            self.fail(rpos, f"equation {eq!r} has no regressor {reg!r}; it has {self.regressors[eq]}")
        return self.coef_pos[(eq, reg)]

    def number(self) -> float:
        kind, val, pos = self.take()
        if kind != "number":
            self.fail(pos, f"expected a number, found {val!r}")
        return float(val)

    def side(self, row: np.ndarray, sign: float) -> float:
        """Parses a sum of terms; adds coefficient weights to row, returns the constant."""
        const = 0.0
        first = True
        while True:
            kind, val, pos = self.peek()
            s = 1.0
            if val in "+-" and kind == "op":
                self.take()
                s = -1.0 if val == "-" else 1.0
            elif not first:
                break
            first = False
            kind, val, pos = self.peek()
            if kind == "number":
                c = self.number()
                if self.peek()[1] == "*":
                    self.take()
                    idx = self.coefficient()
                    row[idx] += sign * s * c
                elif self.peek()[0] in ("name", "quoted"):
                    idx = self.coefficient()
                    row[idx] += sign * s * c
                else:
                    while self.peek()[1] == "/":
                        self.take()
                        d = self.number()
                        if d == 0:
                            self.fail(self.tokens[self.i - 1][2], "division by zero")
                        c /= d
                    const += s * c
            elif kind in ("name", "quoted"):
                idx = self.coefficient()
                c = 1.0
                while self.peek()[1] in ("*", "/"):
                    op = self.take()[1]
                    d = self.number()
                    if op == "/" and d == 0:
                        self.fail(self.tokens[self.i - 1][2], "division by zero")
                    c = c * d if op == "*" else c / d
                row[idx] += sign * s * c
            else:
                self.fail(pos, f"expected a coefficient or a number, found {val!r}" if val else "expected a term, found the end")
        return const

    def parse(self, k: int) -> tuple[np.ndarray, float]:
        row = np.zeros(k)
        left = self.side(row, 1.0)
        kind, val, pos = self.take()
        if val != "=":
            self.fail(pos, f"expected '=' or an operator, found {val!r}" if val else "expected '=' (a restriction is an equation)")
        right = self.side(row, -1.0)
        kind, val, pos = self.peek()
        if kind != "end":
            self.fail(pos, f"unexpected {val!r} after the restriction")
        if not np.any(row):
            self.fail(0, "the restriction mentions no coefficient (or its coefficients cancel)")
        return row, right - left


def parse_restrictions(
    spec: object, names: list[str], regressors: list[list[str]]
) -> RestrictionSet:
    """Builds R and q from the string syntax or from an ``(R, q)`` pair of arrays."""
    k = sum(len(r) for r in regressors)
    if isinstance(spec, tuple) and len(spec) == 2 and not isinstance(spec[0], str):
        for what, part in (("R", spec[0]), ("q", spec[1])):
            kind = np.asarray(part).dtype.kind
            if kind not in "biuf":
                raise RestrictionError(
                    f"{what} must hold real numbers (integers or floats), not dtype "
                    f"{np.asarray(part).dtype} (complex, text, dates or durations are refused)"
                )
        try:
            r = np.atleast_2d(np.asarray(spec[0], dtype=float))
            q = np.atleast_1d(np.asarray(spec[1], dtype=float))
        except (TypeError, ValueError):
            raise RestrictionError(
                f"R and q must be arrays of numbers: R of shape (m, {k}) (one column per "
                "coefficient) and q of length m"
            ) from None
        if r.ndim != 2 or r.shape[1] != k or q.shape != (r.shape[0],):
            raise RestrictionError(
                f"R must have shape (m, {k}) (one column per coefficient) and q length m; "
                f"got R {r.shape} and q {q.shape}"
            )
        if not (np.all(np.isfinite(r)) and np.all(np.isfinite(q))):
            raise RestrictionError("the restrictions contain NaN or infinite values")
        texts = tuple(f"row {i} of R" for i in range(r.shape[0]))
        rset = RestrictionSet(r, q, texts)
        for i in range(r.shape[0]):
            if not np.any(r[i]):
                raise RestrictionError(f"{rset.describe(i)} mentions no coefficient", index=i)
        return rset
    if not isinstance(spec, (str, Sequence)) or isinstance(spec, (bytes, bytearray)):
        raise TypeError(
            "restrictions must be a restriction string such as 'north::price = south::price' "
            "(several separated by ';'), a list of such strings, or an (R, q) pair of arrays "
            f"with R over the order of FittedSystem.coef; got {type(spec).__name__}"
        )
    items = _split(spec)  # type: ignore[arg-type]
    if not items:
        raise RestrictionError("no restrictions were given")
    pos = {}
    c = 0
    for n, regs in zip(names, regressors):
        for reg in regs:
            pos[(n, reg)] = c
            c += 1
    reg_map = dict(zip(names, regressors))
    rows, rhs = [], []
    for text, source in items:
        with np.errstate(all="ignore"):
            row, q = _Parser(text.strip(), pos, reg_map, source).parse(k)
        if not (np.all(np.isfinite(row)) and np.isfinite(q)):
            raise RestrictionSyntaxError(
                f"the numbers in this restriction overflow: {text.strip()!r}", text=text.strip(), position=0
            )
        rows.append(row)
        rhs.append(q)
    return RestrictionSet(np.array(rows), np.array(rhs), tuple(t.strip() for t, _ in items))
