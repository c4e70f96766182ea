"""A small recursive-descent parser for rational expressions in ``s``.

Users write plants as text such as ``"2*(s+3)/((s-1)*(s+4))"`` or
``"1.8*exp(-4*s)/(60*s+1)"``. The parser builds the value directly as
(numerator, denominator, dead time) and never evaluates Python code. Common
factors are never cancelled: a written ``(s+1)/(s+1)`` may be a deliberate hidden
mode that the spec checks must see.

Grammar (``^`` and ``**`` are the same operator)::

    expr    := term (("+" | "-") term)*
    term    := unary (("*" | "/") unary | implicit)*      implicit: "2s", "2(s+1)", "s(s+1)"
    unary   := ("+" | "-")* power
    power   := primary (("^" | "**") ["+" | "-"] INT)?
    primary := NUMBER | "s" | "exp" "(" expr ")" | "(" expr ")"
"""

from __future__ import annotations

import math
import re
from dataclasses import dataclass

import numpy as np

from synth.lti import TransferFunction, polyadd, trim

MAX_LENGTH_CHARS = 10_000
MAX_EXPONENT = 50
MAX_DEGREE = 200      # a plant above this degree is a typo, and its coefficients would overflow
MAX_NESTING = 64      # parentheses deep; keeps the recursion far from Python's limit

_TOKEN = re.compile(r"""
    (?P<ws>\s+)
  | (?P<num>(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?)
  | (?P<name>[A-Za-z_][A-Za-z_0-9]*)
  | (?P<op>\*\*|[-+*/^()])
""", re.VERBOSE | re.ASCII)


class ExpressionError(ValueError):
    """A malformed expression; ``position`` is the 1-based character where the problem is."""

    def __init__(self, message: str, position: int):
        super().__init__(f"{message} at position {position}")
        self.position = position


@dataclass(frozen=True)
class _Token:
    kind: str    # "num", "name", "op", "end" or "bad" (an unexpected character)
    text: str
    pos: int     # 0-based index into the input


@dataclass(frozen=True)
class _Value:
    """num(s)/den(s) * exp(-delay s), unreduced; polynomials trimmed, descending powers."""

    num: np.ndarray
    den: np.ndarray
    delay: float = 0.0


def _tokenize(text: str) -> list[_Token]:
    tokens, i = [], 0
    while i < len(text):
        m = _TOKEN.match(text, i)
        if m is None:  # reported when the parser reaches it, so earlier errors come first
            tokens.append(_Token("bad", text[i], i))
            break
        if m.lastgroup != "ws":
            tokens.append(_Token(m.lastgroup, m.group(), i))
        i = m.end()
    tokens.append(_Token("end", "", len(text)))
    return tokens


class _Parser:
    def __init__(self, text: str):
        self.tokens = _tokenize(text)
        self.i = 0
        self.depth = 0

    # token helpers ---------------------------------------------------------
    @property
    def tok(self) -> _Token:
        return self.tokens[self.i]

    def _advance(self) -> _Token:
        t = self.tokens[self.i]
        self.i += 1
        return t

    def _is(self, *ops: str) -> bool:
        return self.tok.kind == "op" and self.tok.text in ops

    def _fail(self, message: str, tok: _Token | None = None):
        tok = tok or self.tok
        raise ExpressionError(message, tok.pos + 1)

    def _describe(self, tok: _Token) -> str:
        if tok.kind == "bad":
            return f"character {tok.text!r}"
        return "end of expression" if tok.kind == "end" else repr(tok.text)

    def _checked(self, v: _Value, at: _Token) -> _Value:
        """Guard against coefficient overflow and absurd degrees after each operation."""
        if max(v.num.size, v.den.size) - 1 > MAX_DEGREE:
            self._fail(f"polynomial degree exceeds {MAX_DEGREE}", at)
        if not (np.all(np.isfinite(v.num)) and np.all(np.isfinite(v.den))):
            self._fail("coefficients overflow the floating-point range", at)
        if not np.any(v.den):
            self._fail("denominator underflows to zero", at)
        return v

    # grammar ---------------------------------------------------------------
    def parse(self) -> _Value:
        if self.tok.kind == "end":
            self._fail("empty expression")
        v = self.expr()
        if self.tok.kind != "end":
            what = "unmatched ')'" if self._is(")") else f"unexpected {self._describe(self.tok)}"
            self._fail(what)
        return v

    def expr(self) -> _Value:
        v = self.term()
        while self._is("+", "-"):
            op = self._advance()
            w = self.term()
            if op.text == "-":
                w = _Value(-w.num, w.den, w.delay)
            v = self._checked(self._add(v, w, op), op)
        return v

    def _add(self, a: _Value, b: _Value, op: _Token) -> _Value:
        # A zero term has no meaningful dead time; otherwise the delays must agree.
        if not np.any(a.num):
            delay = b.delay
        elif not np.any(b.num):
            delay = a.delay
        elif math.isclose(a.delay, b.delay, rel_tol=1e-12, abs_tol=0.0):
            delay = a.delay
        else:
            self._fail(f"cannot add terms with different dead times ({a.delay:g} s and {b.delay:g} s): "
                       "the result is not a rational function times one exp(-theta*s)", op)
        if np.array_equal(a.den, b.den):
            return _Value(trim(polyadd(a.num, b.num)), a.den, delay)
        num = polyadd(np.polymul(a.num, b.den), np.polymul(b.num, a.den))
        return _Value(trim(num), trim(np.polymul(a.den, b.den)), delay)

    def term(self) -> _Value:
        v = self.unary()
        while True:
            if self._is("*", "/"):
                op = self._advance()
                w = self.unary()
                if op.text == "*":
                    v = self._mul(v, w)
                else:
                    if not np.any(w.num):
                        self._fail("division by zero", op)
                    v = self._mul(v, _Value(w.den, w.num, -w.delay))
                v = self._checked(v, op)
            elif self.tok.kind == "name" or self._is("("):
                at = self.tok
                v = self._checked(self._mul(v, self.power()), at)
            elif self.tok.kind == "num":
                self._fail("missing operator before number")
            else:
                return v

    @staticmethod
    def _mul(a: _Value, b: _Value) -> _Value:
        return _Value(trim(np.polymul(a.num, b.num)), trim(np.polymul(a.den, b.den)), a.delay + b.delay)

    def unary(self) -> _Value:
        negative = False
        while self._is("+", "-"):
            negative ^= self._advance().text == "-"
        v = self.power()
        return _Value(-v.num, v.den, v.delay) if negative else v

    def power(self) -> _Value:
        base = self.primary()
        if not self._is("^", "**"):
            return base
        op = self._advance()
        sign = 1
        if self._is("+", "-"):
            sign = -1 if self._advance().text == "-" else 1
        tok = self.tok
        if tok.kind != "num" or not tok.text.isdigit():
            self._fail("exponent must be an integer such as 2 or -1 (use parentheses for anything else)")
        self._advance()
        n = sign * int(tok.text)
        if abs(n) > MAX_EXPONENT:
            self._fail(f"exponent {n} is outside -{MAX_EXPONENT}..{MAX_EXPONENT}", tok)
        if self._is("^", "**"):
            self._fail("chained powers are ambiguous; use parentheses")
        if n < 0:
            if not np.any(base.num):
                self._fail("division by zero (zero raised to a negative power)", op)
            base, n = _Value(base.den, base.num, -base.delay), -n
        num, den = np.ones(1), np.ones(1)
        for _ in range(n):
            num, den = np.polymul(num, base.num), np.polymul(den, base.den)
            self._checked(_Value(trim(num), trim(den)), op)
        return _Value(trim(num), trim(den), base.delay * n)

    def primary(self) -> _Value:
        tok = self.tok
        if tok.kind == "num":
            self._advance()
            value = float(tok.text)
            if not math.isfinite(value):
                self._fail(f"number {tok.text} is out of the floating-point range", tok)
            return _Value(np.array([value]), np.ones(1))
        if tok.kind == "name":
            self._advance()
            if tok.text == "s":
                return _Value(np.array([1.0, 0.0]), np.ones(1))
            if tok.text == "exp":
                return self._exp(tok)
            self._fail(f"unknown name {tok.text!r} (only 's' and 'exp' are known; "
                       "write products and powers with operators, e.g. '2*s', 's^2')", tok)
        if self._is("("):
            return self._group()
        self._fail(f"expected a number, 's', 'exp(...)' or '(' but found {self._describe(tok)}")

    def _group(self) -> _Value:
        open_tok = self._advance()
        self.depth += 1
        if self.depth > MAX_NESTING:
            self._fail(f"parentheses nested deeper than {MAX_NESTING}", open_tok)
        v = self.expr()
        if not self._is(")"):
            self._fail(f"expected ')' to close the '(' at position {open_tok.pos + 1} "
                       f"but found {self._describe(self.tok)}")
        self._advance()
        self.depth -= 1
        return v

    def _exp(self, name_tok: _Token) -> _Value:
        """exp(-theta*s) with constant theta >= 0: a dead time, returned as the factor 1*exp(-theta s)."""
        if not self._is("("):
            self._fail("expected '(' after 'exp'")
        arg = self._group()
        num, den = arg.num, arg.den
        linear = num.size == 2 and num[1] == 0.0 and den.size == 1 and arg.delay == 0.0
        if not (linear or (not np.any(num) and arg.delay == 0.0)):
            self._fail("exp() argument must be -theta*s with a constant theta >= 0 (a dead time)", name_tok)
        theta = -num[0] / den[0] if linear else 0.0
        if theta < 0:
            self._fail(f"exp() argument {-theta:+g}*s is a time advance (non-causal); "
                       "expected exp(-theta*s) with theta >= 0", name_tok)
        return _Value(np.ones(1), np.ones(1), float(theta))


def parse_rational(text: str) -> TransferFunction:
    """Parse a rational expression in s (optionally times exp(-theta*s)) into an unreduced TransferFunction.

    Raises :class:`ExpressionError` naming the problem and its 1-based character position.
    """
    if not isinstance(text, str):
        raise ExpressionError(f"expected a string, got {type(text).__name__}", 1)
    if len(text) > MAX_LENGTH_CHARS:
        raise ExpressionError(f"expression is longer than {MAX_LENGTH_CHARS} characters", MAX_LENGTH_CHARS + 1)
    v = _Parser(text).parse()
    if v.delay < 0:
        raise ExpressionError(f"net dead time is negative ({v.delay:g} s): dividing by exp(-theta*s) "
                              "is a time advance (non-causal)", 1)
    return TransferFunction(v.num + 0.0, v.den + 0.0, v.delay)  # + 0.0 turns -0.0 into 0.0
