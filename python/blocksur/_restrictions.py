"""Linear restrictions across equations: a small readable syntax, and arrays.

Syntax
------
A coefficient is written ``equation.regressor``. Names made of letters, digits and underscores
are written as they are; any other name goes between backticks: ``north.`log(price)```.
A restriction is ``expression = expression``, each side a sum of terms ``[number [*]] coefficient``,
``coefficient [* number]``, ``coefficient / number`` or a plain number. Several restrictions are
separated by ``;`` or new lines, or given as a list of strings.

Examples::

    north.price = south.price                 # equal price effects in two regions
    food.income + fuel.income + other.income = 0
    2 * north.income - south.income = 0.5; north.weekend = 0

Arrays are accepted too: ``(R, q)`` with ``R`` of shape (m, K) over the order of
``FittedSystem.coef`` and ``q`` of length m.
"""

from __future__ import annotations

import re
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np

from .errors import RestrictionError, RestrictionSyntaxError

__all__ = ["parse_restrictions", "RestrictionSet"]

_TOKEN = re.compile(
    r"""
    (?P<space>[ \t\r]+)
  | (?P<number>(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?)
  | (?P<name>[A-Za-z_][A-Za-z0-9_]*)
  | (?P<quoted>`[^`]*`)
  | (?P<op>[-+*/=.])
  """,
    re.VERBOSE,
)


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


def _split(spec: str | Sequence[str]) -> list[str]:
    items = [spec] if isinstance(spec, str) else list(spec)
    out: list[str] = []
    for item in items:
        if not isinstance(item, str):
            raise RestrictionError(f"a restriction must be a string, not {type(item).__name__}")
        out.extend(part for part in re.split(r"[;\n]", item) if part.strip())
    return out


class _Parser:
    def __init__(self, text: str, coef_pos: dict[tuple[str, str], int], regressors: dict[str, list[str]]):
        self.text = text
        self.coef_pos = coef_pos
        self.regressors = regressors
        self.tokens: list[tuple[str, str, int]] = []
        pos = 0
        while pos < len(text):
            m = _TOKEN.match(text, pos)
            if m is None:
                self.fail(pos, f"unexpected character {text[pos]!r}")
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
            return val[1:-1], pos
        self.fail(pos, f"expected a name, found {val!r}" if val else "expected a name, found the end")
        raise AssertionError  # unreachable

    def coefficient(self) -> int:
        eq, pos = self.name()
        kind, val, dpos = self.peek()
        if val != ".":
            self.fail(dpos, f"expected '.' after equation name {eq!r} (write equation.regressor)")
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
            "restrictions must be a restriction string such as 'north.price = south.price' "
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
    for text in items:
        with np.errstate(all="ignore"):
            row, q = _Parser(text.strip(), pos, reg_map).parse(k)
        if not (np.all(np.isfinite(row)) and np.isfinite(q)):
            raise RestrictionSyntaxError(
                f"the numbers in this restriction overflow: {text.strip()!r}", text=text.strip(), position=0
            )
        rows.append(row)
        rhs.append(q)
    return RestrictionSet(np.array(rows), np.array(rhs), tuple(t.strip() for t in items))
