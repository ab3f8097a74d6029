"""The safe expression language for universes and conditions.

A config says which records an indicator covers and which of them count, e.g.::

    universe:  "age >= 15 and age <= 64"
    condition: "region in ['R1', 'R2'] and not is_missing(smoker)"

`compile_expression` parses such a text once, checks it against the declared columns and returns a
`CompiledExpression`; `CompiledExpression.evaluate(frame)` applies it to a whole batch of records at
once with numpy (never row by row) and returns a boolean array, True where the record is selected.

Grammar, lowest precedence first::

    expression  := or_expr
    or_expr     := and_expr ("or" and_expr)*
    and_expr    := not_expr ("and" not_expr)*
    not_expr    := "not" not_expr | comparison
    comparison  := additive [ ("==" | "!=" | "<" | "<=" | ">" | ">=") additive
                            | ["not"] "in" "[" value ("," value)* [","] "]" ]
    additive    := term (("+" | "-") term)*
    term        := unary (("*" | "/") unary)*
    unary       := "-" unary | primary
    primary     := number | string | "true" | "false" | column | "is_missing(" column ")"
                 | "(" expression ")"

* Numbers: 3, 2.5, .5, 1e3. Strings: '...' or "...", with \\', \\" and \\\\ as the only escapes.
* Column names: [A-Za-z_][A-Za-z0-9_]*, must be declared, may not start with "__" and may not be
  a keyword (and, or, not, in, true, false).
* Comparisons do not chain: "a < b < c" is an error (write "a < b and b < c").
* Lists appear only after "in" / "not in" and hold only numbers or only strings.
* is_missing(column) is the only function. Nothing else can be called, no attribute access, no
  indexing: the text is tokenized and parsed here by hand, never handed to Python (no eval, no
  compile, no ast, no pandas.eval), so an expression cannot reach the interpreter, files or modules.

Types are checked when the expression is compiled, as far as they are known then: and/or/not need
true/false operands, + - * / need numbers, both sides of a comparison must have the same type
(numbers, strings or true/false; ordering <, <=, >, >= is not defined for true/false) and the
whole expression must be true/false. Column types are only known from the data, so a column's
use (compared with a string, used in arithmetic, ...) is recorded at compile time, a column used
two incompatible ways is rejected then, and the data's actual type is checked at the start of
every `evaluate`. Arithmetic is done in float64.

Missing values
--------------
A value is missing when it is NaN, None or pandas.NA in its column: float NaN, the NA of
nullable Int64/Float64/boolean columns, None/NaN/NA in string and object columns, a missing
category. Expressions follow three-valued (Kleene) logic, as in SQL (ISO/IEC 9075):

* a comparison, an in/not in test or an arithmetic operation with a missing operand is
  *unknown*; dividing by zero is also unknown (never inf);
* ``unknown and false`` is false, ``unknown and true`` is unknown;
  ``unknown or true`` is true, ``unknown or false`` is unknown; ``not unknown`` is unknown;
* ``is_missing(col)`` is always true or false, never unknown.

At the end an unknown result counts as false: the record is not selected.
`CompiledExpression.evaluate_three_valued` returns the unknown mask as well, for callers that
treat "unknown" differently from "false" (e.g. item non-response in a condition).

Errors
------
Every problem is one line that names the key path, quotes the expression and gives the 0-based
character position, e.g.::

    indicators.smoker.condition: unexpected 'open(' at position 0 in "open('x')": only
    is_missing(column) may be called

(printed on one line). Syntax errors stop at the first problem; unknown columns and type errors
are collected. One problem is raised as `ExpressionError(line)`; several as
`ExpressionError("<key path>: N problems in expression \\"...\\"", problems=[line, ...])`.
A mismatch between the data and the expression found by `evaluate` (a numeric column compared
with a string, a column missing from the frame) is an `ExpressionError` worded the same way.
"""

from __future__ import annotations

import difflib
import json
import keyword
import math
import operator
import re
from collections.abc import Collection, Mapping
from dataclasses import dataclass, field
from typing import Any, NoReturn

import numpy as np
import pandas as pd

from pipeline.errors import ExpressionError

__all__ = ["CompiledExpression", "compile_expression"]

# Static and runtime value types. ANY is a column before the data is seen; EMPTY is a column whose
# values are all missing, so its type cannot be told and it is compatible with every use.
NUMBER, STRING, BOOL, ANY, EMPTY = "number", "string", "bool", "any", "empty"
_A = {NUMBER: "a number", STRING: "a string", BOOL: "a true/false value"}
_PLURAL = {NUMBER: "numbers", STRING: "strings", BOOL: "true/false values", EMPTY: "only missing values"}

_KEYWORDS = frozenset({"and", "or", "not", "in", "true", "false"})
_MISSING_WORDS = frozenset({"none", "null", "nan", "na", "nil"})
_PYTHON_WORDS = frozenset(keyword.kwlist) - _KEYWORDS
_FUNCTION = "is_missing"
_MAX_NESTING = 50  # parentheses / not / unary minus; keeps the recursive parser far from the stack limit
_MAX_DEPTH = 200  # tree depth, for long chains like a + a + ... built by loops
_SHORT_COLUMN_LIST = 12  # list the declared columns in "unknown column" messages up to this many

_NUMBER_RE = re.compile(r"(?:[0-9]+(?:\.[0-9]*)?|\.[0-9]+)(?:[eE][+-]?[0-9]+)?")
_NAME_RE = re.compile(r"[A-Za-z_][A-Za-z0-9_]*")
_WORD_TAIL_RE = re.compile(r"[A-Za-z0-9_.]*")

_COMPARISONS = ("==", "!=", "<=", ">=", "<", ">")
_ORDERINGS = frozenset({"<", "<=", ">", ">="})
_OPERATORS = _COMPARISONS + ("+", "-", "*", "/", "(", ")", "[", "]", ",")
# Operators people bring from Python, SQL or C, with what to write instead. Two-character ones are
# listed first so that "**" is reported as itself rather than as "*" "*".
_MISUSED = (
    ("**", "powers are not supported; the operators are + - * /"),
    ("//", "integer division is not supported; the operators are + - * /"),
    ("&&", "write 'and'"),
    ("||", "write 'or'"),
    ("<>", "write '!='"),
    ("=", "write '==' to compare"),
    ("!", "write 'not'"),
    ("&", "write 'and'"),
    ("|", "write 'or'"),
    ("~", "write 'not'"),
    ("%", "the operators are + - * /"),
    ("^", "the operators are + - * /"),
    (":", "slices, lambdas and dictionaries are not part of the language"),
    ("{", "sets and dictionaries are not part of the language"),
    ("}", "sets and dictionaries are not part of the language"),
    ("@", "the operators are + - * /"),
)
_COMPARE_FUNCTIONS = {
    "==": operator.eq,
    "!=": operator.ne,
    "<": operator.lt,
    "<=": operator.le,
    ">": operator.gt,
    ">=": operator.ge,
}


# --------------------------------------------------------------------------------------------
# Messages


def _quote_expression(text: str) -> str:
    # JSON quoting escapes newlines and double quotes, so the message stays on one line.
    return json.dumps(text, ensure_ascii=False)


def _snip(fragment: str, limit: int = 40) -> str:
    fragment = " ".join(fragment.split())
    if len(fragment) > limit:
        fragment = fragment[: limit - 3] + "..."
    return f'"{fragment}"' if "'" in fragment else f"'{fragment}'"


def _format_problem(key_path: str, text: str, what: str, position: int, hint: str | None) -> str:
    line = f"{key_path}: {what} at position {position} in {_quote_expression(text)}"
    return f"{line}: {hint}" if hint else line


def _raise_problems(key_path: str, text: str, problems: list[str]) -> NoReturn:
    if len(problems) == 1:
        raise ExpressionError(problems[0])
    raise ExpressionError(
        f"{key_path}: {len(problems)} problems in expression {_quote_expression(text)}", problems
    )


# --------------------------------------------------------------------------------------------
# Tokens


@dataclass(frozen=True, slots=True)
class _Token:
    kind: str  # number | string | name | keyword | op | end | error
    text: str
    pos: int
    value: Any = None  # the literal's value; (what, hint) for an error token

    def is_op(self, *ops: str) -> bool:
        return self.kind == "op" and self.text in ops

    def is_keyword(self, word: str) -> bool:
        return self.kind == "keyword" and self.text == word


def _tokenize(text: str) -> list[_Token]:
    """Split the text into tokens. A lexical error becomes a final 'error' token, so the parser
    reports problems strictly left to right (e.g. a call at position 0 before a ':' at 8)."""
    tokens: list[_Token] = []
    i, n = 0, len(text)

    def error(fragment: str, pos: int, what: str, hint: str | None) -> list[_Token]:
        tokens.append(_Token("error", fragment, pos, (what, hint)))
        return tokens

    while True:
        while i < n and text[i].isspace():
            i += 1
        if i >= n:
            tokens.append(_Token("end", "", n))
            return tokens
        c = text[i]
        nxt = text[i + 1] if i + 1 < n else ""

        if c in "0123456789" or (c == "." and nxt in tuple("0123456789")):
            match = _NUMBER_RE.match(text, i)
            raw, j = match.group(), match.end()
            if j < n and (text[j].isalnum() or text[j] in "._"):
                word = text[i : _WORD_TAIL_RE.match(text, j).end()]
                return error(word, i, f"malformed number {_snip(word)}", "numbers look like 3, 2.5 or 1e3")
            value: int | float
            if "." in raw or "e" in raw or "E" in raw or len(raw) > 18:
                value = float(raw)
            else:
                value = int(raw)
            if not math.isfinite(value):
                return error(raw, i, f"number {_snip(raw)} is too large", None)
            tokens.append(_Token("number", raw, i, value))
            i = j
            continue

        if c in "'\"":
            j, chars = i + 1, []
            while True:
                if j >= n:
                    return error(c, i, "unterminated string", f"close it with {c}")
                ch = text[j]
                if ch == "\\":
                    if j + 1 < n and text[j + 1] in "\\'\"":
                        chars.append(text[j + 1])
                        j += 2
                        continue
                    return error(
                        text[j : j + 2], j, f"unsupported escape {_snip(text[j : j + 2])}",
                        "the only escapes are \\', \\\" and \\\\",
                    )
                if ch == c:
                    break
                chars.append(ch)
                j += 1
            tokens.append(_Token("string", text[i : j + 1], i, "".join(chars)))
            i = j + 1
            continue

        match = _NAME_RE.match(text, i)
        if match:
            word = match.group()
            tokens.append(_Token("keyword" if word in _KEYWORDS else "name", word, i, word))
            i = match.end()
            continue

        if c == ".":
            attribute = _NAME_RE.match(text, i + 1)
            fragment = "." + attribute.group() if attribute else "."
            return error(fragment, i, f"unexpected {_snip(fragment)}", "attribute access is not allowed")

        op = ""
        for candidate in _OPERATORS:
            if text.startswith(candidate, i):
                op = candidate
                break
        for bad, hint in _MISUSED:
            # A misused operator wins only when at least as long as the valid match, so "<>" is
            # caught but "==" and "!=" are not read as "=" and "!".
            if text.startswith(bad, i) and len(bad) >= len(op):
                return error(bad, i, f"unexpected {_snip(bad)}", hint)
        if op:
            tokens.append(_Token("op", op, i))
            i += len(op)
            continue
        return error(c, i, f"unexpected character {_snip(c)}", None)


# --------------------------------------------------------------------------------------------
# Values at evaluation time


class _Value:
    """A column-long result: `data` holds values (arbitrary where missing), `missing` the
    unknown/missing mask. Either may be a scalar, which numpy broadcasts."""

    __slots__ = ("kind", "data", "missing")

    def __init__(self, kind: str, data: Any, missing: Any):
        self.kind, self.data, self.missing = kind, data, missing


_PLACEHOLDER = {NUMBER: 0.0, STRING: "", BOOL: np.False_}


def _all_unknown(kind: str, missing: Any) -> _Value:
    return _Value(kind, _PLACEHOLDER[kind], missing)


# --------------------------------------------------------------------------------------------
# Syntax tree. Each node knows its span in the text (for messages), its static type (`check`)
# and how to compute itself over whole columns (`evaluate`).


@dataclass(frozen=True, slots=True, eq=False)
class _Node:
    start: int
    end: int

    def children(self) -> tuple[_Node, ...]:
        return ()


@dataclass(frozen=True, slots=True, eq=False)
class _Literal(_Node):
    kind: str
    value: Any

    def check(self, checker: _Checker) -> str:
        return self.kind

    def evaluate(self, env: _Env) -> _Value:
        return _Value(self.kind, self.value, np.False_)


@dataclass(frozen=True, slots=True, eq=False)
class _Column(_Node):
    name: str

    def check(self, checker: _Checker) -> str:
        return ANY

    def evaluate(self, env: _Env) -> _Value:
        return env.column(self.name)


@dataclass(frozen=True, slots=True, eq=False)
class _IsMissing(_Node):
    column: _Column

    def children(self) -> tuple[_Node, ...]:
        return (self.column,)

    def check(self, checker: _Checker) -> str:
        return BOOL

    def evaluate(self, env: _Env) -> _Value:
        return _Value(BOOL, env.column(self.column.name).missing, np.False_)


@dataclass(frozen=True, slots=True, eq=False)
class _Not(_Node):
    operand: _Node

    def children(self) -> tuple[_Node, ...]:
        return (self.operand,)

    def check(self, checker: _Checker) -> str:
        checker.need_condition(self.operand, "'not' needs a true/false condition", "is negated with 'not'")
        return BOOL

    def evaluate(self, env: _Env) -> _Value:
        value = self.operand.evaluate(env)
        # Kleene: not unknown = unknown, so the mask carries over unchanged.
        return _Value(BOOL, np.logical_not(value.data), value.missing)


@dataclass(frozen=True, slots=True, eq=False)
class _Logical(_Node):
    op: str  # "and" | "or"
    operands: tuple[_Node, ...]

    def children(self) -> tuple[_Node, ...]:
        return self.operands

    def check(self, checker: _Checker) -> str:
        for operand in self.operands:
            checker.need_condition(
                operand, f"'{self.op}' needs a true/false condition on each side", f"is used with '{self.op}'"
            )
        return BOOL

    def evaluate(self, env: _Env) -> _Value:
        # Kleene logic from definite truth: "and" is false if any side is definitely false and
        # true only if every side is definitely true; "or" mirrors it. Anything else is unknown.
        definitely_true = definitely_false = None
        for operand in self.operands:
            value = operand.evaluate(env)
            known = np.logical_not(value.missing)
            is_true = np.logical_and(value.data, known)
            is_false = np.logical_and(np.logical_not(value.data), known)
            if definitely_true is None:
                definitely_true, definitely_false = is_true, is_false
            elif self.op == "and":
                definitely_true = np.logical_and(definitely_true, is_true)
                definitely_false = np.logical_or(definitely_false, is_false)
            else:
                definitely_true = np.logical_or(definitely_true, is_true)
                definitely_false = np.logical_and(definitely_false, is_false)
        unknown = np.logical_not(np.logical_or(definitely_true, definitely_false))
        return _Value(BOOL, definitely_true, unknown)


@dataclass(frozen=True, slots=True, eq=False)
class _Compare(_Node):
    op: str
    op_pos: int
    left: _Node
    right: _Node

    def children(self) -> tuple[_Node, ...]:
        return (self.left, self.right)

    def check(self, checker: _Checker) -> str:
        left, right = self.left.check(checker), self.right.check(checker)
        for side, kind, other in ((self.left, left, right), (self.right, right, left)):
            if kind == ANY and other != ANY:
                checker.use(side, other, f"is compared with {_A[other]}")
        if self.op in _ORDERINGS and BOOL in (left, right):
            checker.problem(f"{_snip(self.op)} cannot order true/false values", self.op_pos, "use == or !=")
        elif ANY not in (left, right) and left != right:
            checker.problem(
                f"{checker.snip(self.left)} ({_A[left]}) is compared with "
                f"{checker.snip(self.right)} ({_A[right]})",
                self.op_pos,
                "both sides of a comparison must be numbers, strings or true/false values alike",
            )
        return BOOL

    def evaluate(self, env: _Env) -> _Value:
        left, right = self.left.evaluate(env), self.right.evaluate(env)
        missing = np.logical_or(left.missing, right.missing)
        if EMPTY in (left.kind, right.kind):
            return _all_unknown(BOOL, missing)
        if left.kind != right.kind:
            # Only two columns can get here: every other mismatch is caught at compile time.
            env.fail(
                f"column {_snip(env.name_of(self.left))} holds {_PLURAL[left.kind]} but column "
                f"{_snip(env.name_of(self.right))} holds {_PLURAL[right.kind]}",
                self.op_pos,
                "both sides of a comparison must have the same type",
            )
        if self.op in _ORDERINGS and left.kind == BOOL:
            env.fail(f"{_snip(self.op)} cannot order true/false values", self.op_pos, "use == or !=")
        data = np.asarray(_COMPARE_FUNCTIONS[self.op](left.data, right.data), dtype=bool)
        return _Value(BOOL, data, missing)


@dataclass(frozen=True, slots=True, eq=False)
class _Membership(_Node):
    operand: _Node
    kind: str  # of the list items
    values: tuple[Any, ...]
    negated: bool

    def children(self) -> tuple[_Node, ...]:
        return (self.operand,)

    def check(self, checker: _Checker) -> str:
        kind = self.operand.check(checker)
        if kind == ANY:
            checker.use(self.operand, self.kind, f"is tested against a list of {_PLURAL[self.kind]}")
        elif kind != self.kind:
            checker.problem(
                f"{checker.snip(self.operand)} is {_A[kind]} but the list holds {_PLURAL[self.kind]}",
                self.operand.start,
                "the list must hold values of the same type as what is tested",
            )
        return BOOL

    def evaluate(self, env: _Env) -> _Value:
        value = self.operand.evaluate(env)
        if value.kind == EMPTY:
            return _all_unknown(BOOL, value.missing)
        if np.ndim(value.data) == 0:
            found = np.bool_(value.data in self.values)
        elif self.kind == NUMBER:
            found = np.isin(value.data, np.asarray(self.values))
        else:
            # A hash lookup; numpy's isin would sort the object array.
            found = pd.Series(value.data, dtype=object, copy=False).isin(self.values).to_numpy()
        # The missing mask carries over: "missing in [...]" and "missing not in [...]" are unknown.
        return _Value(BOOL, np.logical_not(found) if self.negated else found, value.missing)


@dataclass(frozen=True, slots=True, eq=False)
class _Arithmetic(_Node):
    op: str
    op_pos: int
    left: _Node
    right: _Node

    def children(self) -> tuple[_Node, ...]:
        return (self.left, self.right)

    def check(self, checker: _Checker) -> str:
        for side in (self.left, self.right):
            checker.need_number(
                side, f"'{self.op}' needs numbers on both sides", f"is used in arithmetic with '{self.op}'"
            )
        return NUMBER

    def evaluate(self, env: _Env) -> _Value:
        left, right = self.left.evaluate(env), self.right.evaluate(env)
        # float64 throughout: small integer columns (int8, uint8) would otherwise wrap around.
        a = np.asarray(left.data, dtype=np.float64)
        b = np.asarray(right.data, dtype=np.float64)
        missing = np.logical_or(left.missing, right.missing)
        if self.op == "+":
            data = a + b
        elif self.op == "-":
            data = a - b
        elif self.op == "*":
            data = a * b
        else:
            data = a / b
            missing = np.logical_or(missing, b == 0)  # x / 0 is unknown, not inf
        return _Value(NUMBER, data, np.logical_or(missing, np.isnan(data)))


@dataclass(frozen=True, slots=True, eq=False)
class _Negative(_Node):
    operand: _Node

    def children(self) -> tuple[_Node, ...]:
        return (self.operand,)

    def check(self, checker: _Checker) -> str:
        checker.need_number(self.operand, "'-' needs a number", "is negated with '-'")
        return NUMBER

    def evaluate(self, env: _Env) -> _Value:
        value = self.operand.evaluate(env)
        return _Value(NUMBER, -np.asarray(value.data, dtype=np.float64), value.missing)


def _walk(root: _Node) -> list[tuple[_Node, int]]:
    """Every node with its depth, in text order, without recursion (chains can be long)."""
    out, stack = [], [(root, 1)]
    while stack:
        node, depth = stack.pop()
        out.append((node, depth))
        stack.extend((child, depth + 1) for child in reversed(node.children()))
    return out


# --------------------------------------------------------------------------------------------
# Parser


class _Parser:
    def __init__(self, text: str, key_path: str, declared: frozenset[str]):
        self.text, self.key_path, self.declared = text, key_path, declared
        self.tokens = _tokenize(text)
        self.index = 0
        self.nesting = 0

    def fail(self, what: str, position: int, hint: str | None = None) -> NoReturn:
        raise ExpressionError(_format_problem(self.key_path, self.text, what, position, hint))

    @property
    def current(self) -> _Token:
        token = self.tokens[self.index]
        if token.kind == "error":
            self.fail(token.value[0], token.pos, token.value[1])
        return token

    def peek(self) -> _Token:
        """The token after the current one; a lexical error there is raised only when reached."""
        return self.tokens[min(self.index + 1, len(self.tokens) - 1)]

    def advance(self) -> _Token:
        token = self.current
        self.index += 1
        return token

    def enter(self, position: int) -> None:
        self.nesting += 1
        if self.nesting > _MAX_NESTING:
            self.fail("expression nests too deeply", position, f"at most {_MAX_NESTING} levels are allowed")

    def parse(self) -> _Node:
        if not self.text.strip():
            self.fail("empty expression", 0, "write a condition such as 'age >= 15'")
        node = self.parse_or()
        token = self.current
        if token.kind != "end":
            self.unexpected_after_operand(token)
        return node

    def unexpected_after_operand(self, token: _Token) -> NoReturn:
        """Where an operator, ')' or the end should come."""
        hint = "expected an operator (such as ==, and, or) or the end of the expression"
        fragment = token.text
        if token.is_op(")"):
            hint = "there is no '(' for it to close"
        elif token.is_op("("):
            hint = "only is_missing(column) may be called"
        elif token.is_op("["):
            hint = "indexing is not allowed; a list may only follow 'in' or 'not in'"
        elif token.kind == "name" and token.text.lower() in _KEYWORDS:
            hint = f"keywords are written in lower case: {_snip(token.text.lower())}"
        elif token.kind == "name" and token.text == "is":
            hint = "write is_missing(column) to test for a missing value, and == to compare"
        elif token.kind == "name" and token.text in _PYTHON_WORDS:
            hint = "Python syntax is not part of the expression language"
        self.fail(f"unexpected {_snip(fragment)}", token.pos, hint)

    def parse_or(self) -> _Node:
        return self.parse_logical("or", self.parse_and)

    def parse_and(self) -> _Node:
        return self.parse_logical("and", self.parse_not)

    def parse_logical(self, word: str, parse_operand) -> _Node:
        operands = [parse_operand()]
        while self.current.is_keyword(word):
            self.advance()
            operands.append(parse_operand())
        if len(operands) == 1:
            return operands[0]
        return _Logical(operands[0].start, operands[-1].end, word, tuple(operands))

    def parse_not(self) -> _Node:
        token = self.current
        if token.is_keyword("not"):
            self.enter(token.pos)
            self.advance()
            operand = self.parse_not()
            self.nesting -= 1
            return _Not(token.pos, operand.end, operand)
        return self.parse_comparison()

    def at_comparison(self) -> bool:
        token = self.current
        return (
            token.is_op(*_COMPARISONS)
            or token.is_keyword("in")
            or (token.is_keyword("not") and self.peek().is_keyword("in"))
        )

    def parse_comparison(self) -> _Node:
        left = self.parse_additive()
        if not self.at_comparison():
            return left
        token = self.advance()
        if token.kind == "op":
            right = self.parse_additive()
            node: _Node = _Compare(left.start, right.end, token.text, token.pos, left, right)
        else:
            negated = token.is_keyword("not")
            if negated:
                self.advance()  # the "in"
            node = self.parse_list(left, negated)
        if self.at_comparison():
            extra = self.current
            self.fail(
                f"unexpected {_snip(extra.text)} after a comparison",
                extra.pos,
                "comparisons do not chain: write 'a < b and b < c' instead of 'a < b < c'",
            )
        return node

    def parse_list(self, operand: _Node, negated: bool) -> _Node:
        opening = self.current
        if not opening.is_op("["):
            self.fail(
                f"expected '[' after {_snip('not in' if negated else 'in')}",
                opening.pos,
                "write the values in square brackets, e.g. region in ['R1', 'R2']",
            )
        self.advance()
        items: list[Any] = []
        kind = None
        while True:
            token = self.current
            if token.is_op("]"):
                if not items:
                    self.fail("empty list", opening.pos, "a list after 'in' needs at least one value")
                break
            start = token.pos
            sign = 1
            if token.is_op("-"):
                self.advance()
                token, sign = self.current, -1
                if token.kind != "number":
                    self.fail(
                        f"unexpected {_snip(token.text or 'end')} in a list", token.pos, "expected a number after '-'"
                    )
            if token.kind == "number":
                item_kind, value = NUMBER, sign * token.value
            elif token.kind == "string":
                item_kind, value = STRING, token.value
            elif token.kind == "end":
                self.fail("unclosed '['", opening.pos, "expected ']' before the end of the expression")
            else:
                self.fail(
                    f"unexpected {_snip(token.text)} in a list",
                    token.pos,
                    "list items must be numbers or strings, not columns or expressions",
                )
            if kind is not None and item_kind != kind:
                self.fail(
                    f"list mixes {_PLURAL[kind]} and {_PLURAL[item_kind]}",
                    start,
                    "a list holds only numbers or only strings",
                )
            kind = item_kind
            items.append(value)
            self.advance()
            token = self.current
            if token.is_op(","):
                self.advance()
            elif token.kind == "end":
                self.fail("unclosed '['", opening.pos, "expected ']' before the end of the expression")
            elif not token.is_op("]"):
                self.fail(f"unexpected {_snip(token.text)} in a list", token.pos, "expected ',' or ']'")
        closing = self.advance()
        values = tuple(dict.fromkeys(items))
        return _Membership(operand.start, closing.pos + 1, operand, kind, values, negated)

    def parse_additive(self) -> _Node:
        return self.parse_binary(("+", "-"), self.parse_term)

    def parse_term(self) -> _Node:
        return self.parse_binary(("*", "/"), self.parse_unary)

    def parse_binary(self, ops: tuple[str, ...], parse_operand) -> _Node:
        # A loop, so "a - b - c" groups to the left.
        node = parse_operand()
        while self.current.is_op(*ops):
            token = self.advance()
            right = parse_operand()
            node = _Arithmetic(node.start, right.end, token.text, token.pos, node, right)
        return node

    def parse_unary(self) -> _Node:
        token = self.current
        if not token.is_op("-"):
            return self.parse_primary()
        self.enter(token.pos)
        self.advance()
        operand = self.parse_unary()
        self.nesting -= 1
        if isinstance(operand, _Literal) and operand.kind == NUMBER:
            return _Literal(token.pos, operand.end, NUMBER, -operand.value)  # keeps -1 an int
        return _Negative(token.pos, operand.end, operand)

    def parse_primary(self) -> _Node:
        token = self.current
        if token.kind == "number":
            self.advance()
            return _Literal(token.pos, token.pos + len(token.text), NUMBER, token.value)
        if token.kind == "string":
            self.advance()
            return _Literal(token.pos, token.pos + len(token.text), STRING, token.value)
        if token.is_keyword("true") or token.is_keyword("false"):
            self.advance()
            return _Literal(token.pos, token.pos + len(token.text), BOOL, np.bool_(token.text == "true"))
        if token.is_op("("):
            self.enter(token.pos)
            self.advance()
            inner = self.parse_or()
            closing = self.current
            if closing.kind == "end":
                self.fail("unclosed '('", token.pos, "expected ')' before the end of the expression")
            if not closing.is_op(")"):
                self.unexpected_after_operand(closing)
            self.advance()
            self.nesting -= 1
            return inner
        if token.kind == "name":
            return self.parse_name(token)
        if token.is_op("["):
            self.fail("unexpected '['", token.pos, "a list may only follow 'in' or 'not in'")
        if token.kind == "end":
            previous = self.tokens[self.index - 1].text if self.index else ""
            self.fail("unexpected end of the expression", token.pos, f"expected a value after {_snip(previous)}")
        self.fail(
            f"unexpected {_snip(token.text)}",
            token.pos,
            "expected a number, a string, a column name, true, false, is_missing(column) or '('",
        )

    def parse_name(self, token: _Token) -> _Node:
        name, following = token.text, self.peek()
        if following.is_op("("):
            if name == _FUNCTION:
                return self.parse_is_missing(token)
            self.fail(f"unexpected {_snip(name + '(')}", token.pos, "only is_missing(column) may be called")
        if name.startswith("__"):
            self.fail(f"unexpected {_snip(name)}", token.pos, "names starting with '__' are not allowed")
        if name == _FUNCTION:
            self.fail(
                f"unexpected {_snip(name)}", token.pos, "is_missing must be called with a column: is_missing(column)"
            )
        if following.is_op("["):
            self.fail(
                f"unexpected {_snip(name + '[')}",
                token.pos,
                "indexing is not allowed; a list may only follow 'in' or 'not in'",
            )
        if (name in _PYTHON_WORDS or name.lower() in _KEYWORDS) and name not in self.declared:
            if name.lower() in _KEYWORDS:
                hint = f"keywords are written in lower case: {_snip(name.lower())}"
            elif name == "None":
                hint = "write is_missing(column) to test for a missing value"
            else:
                hint = "Python syntax is not part of the expression language"
            self.fail(f"unexpected {_snip(name)}", token.pos, hint)
        self.advance()
        return _Column(token.pos, token.pos + len(name), name)

    def parse_is_missing(self, name_token: _Token) -> _Node:
        self.advance()
        self.advance()  # the "("
        argument = self.current
        closing = self.peek()
        if argument.kind == "name" and not argument.text.startswith("__") and closing.is_op(")"):
            self.advance()
            end = self.advance().pos + 1
            column = _Column(argument.pos, argument.pos + len(argument.text), argument.text)
            return _IsMissing(name_token.pos, end, column)
        if closing.kind == "error":
            fragment = argument.text
        else:
            fragment = self.text[argument.pos : closing.pos + len(closing.text)]
        self.fail(
            f"unexpected {_snip(fragment or 'end')} in is_missing(...)",
            argument.pos,
            "is_missing takes exactly one column name, e.g. is_missing(smoker)",
        )


# --------------------------------------------------------------------------------------------
# Compile-time checks


@dataclass(frozen=True, slots=True)
class _Use:
    """How the expression uses a column, recorded to check the data's type against."""

    column: str
    kind: str
    position: int
    usage: str  # completes "column 'x' holds strings but ..."


class _Checker:
    def __init__(self, text: str, key_path: str):
        self.text, self.key_path = text, key_path
        self.problems: list[str] = []
        self.uses: dict[str, _Use] = {}  # first use of each column

    def snip(self, node: _Node) -> str:
        return _snip(self.text[node.start : node.end])

    def problem(self, what: str, position: int, hint: str | None = None) -> None:
        self.problems.append(_format_problem(self.key_path, self.text, what, position, hint))

    def use(self, node: _Node, kind: str, usage: str) -> None:
        assert isinstance(node, _Column)
        first = self.uses.get(node.name)
        if first is None:
            self.uses[node.name] = _Use(node.name, kind, node.start, usage)
        elif first.kind != kind:
            self.problem(
                f"column {_snip(node.name)} {usage}",
                node.start,
                f"at position {first.position} it {first.usage}, and a column holds only one type",
            )

    def need(self, node: _Node, kind: str, hint: str, usage: str) -> None:
        found = node.check(self)
        if found == ANY:
            self.use(node, kind, usage)
        elif found != kind:
            self.problem(f"{self.snip(node)} is {_A[found]}", node.start, hint)

    def need_condition(self, node: _Node, hint: str, usage: str) -> None:
        self.need(node, BOOL, hint, usage)

    def need_number(self, node: _Node, hint: str, usage: str) -> None:
        self.need(node, NUMBER, hint, usage)


def _unknown_column_problem(name: str, position: int, declared: frozenset[str], key_path: str, text: str) -> str:
    lowered = {column.lower(): column for column in declared}
    match = lowered.get(name.lower()) or next(iter(difflib.get_close_matches(name, sorted(declared), n=1)), None)
    if name.lower() in _MISSING_WORDS:
        hint = "write is_missing(column) to test for a missing value"
    elif match:
        hint = f"did you mean {_snip(match)}?"
    elif not declared:
        hint = "no columns are declared"
    else:
        hint = "declare it under source.variables"
    if declared and len(declared) <= _SHORT_COLUMN_LIST:
        hint += f" (declared columns: {', '.join(sorted(declared))})"
    return _format_problem(key_path, text, f"unknown column {_snip(name)}", position, hint)


# --------------------------------------------------------------------------------------------
# Reading columns from the data


def _classify(series: pd.Series) -> tuple[str, np.ndarray, np.ndarray] | str:
    """(kind, data, missing) for a column, or a description of a type expressions cannot use."""
    dtype = series.dtype
    size = len(series)
    if isinstance(dtype, pd.CategoricalDtype):
        categories = _classify(pd.Series(dtype.categories, dtype=dtype.categories.dtype))
        if isinstance(categories, str):
            return categories
        kind, category_data, category_missing = categories
        codes = series.cat.codes.to_numpy()
        if kind == EMPTY or len(category_data) == 0:
            return EMPTY, np.zeros(size), np.ones(size, dtype=bool)
        safe = np.where(codes < 0, 0, codes)
        return kind, category_data[safe], (codes < 0) | category_missing[safe]
    if pd.api.types.is_bool_dtype(dtype):
        missing = series.isna().to_numpy(dtype=bool)
        return BOOL, series.to_numpy(dtype=bool, na_value=False), missing
    if pd.api.types.is_numeric_dtype(dtype) and not pd.api.types.is_complex_dtype(dtype):
        if isinstance(dtype, np.dtype):
            data = series.to_numpy()
            missing = np.isnan(data) if dtype.kind == "f" else np.zeros(size, dtype=bool)
            return NUMBER, data, missing
        missing = series.isna().to_numpy(dtype=bool)
        if pd.api.types.is_integer_dtype(dtype):
            return NUMBER, series.to_numpy(dtype=getattr(dtype, "numpy_dtype", np.int64), na_value=0), missing
        data = series.to_numpy(dtype=np.float64, na_value=np.nan)
        return NUMBER, data, missing | np.isnan(data)
    if dtype == object:
        missing = series.isna().to_numpy(dtype=bool)
        inferred = pd.api.types.infer_dtype(series, skipna=True)
        if inferred == "empty":
            return EMPTY, np.zeros(size), np.ones(size, dtype=bool)
        if inferred in ("integer", "floating", "mixed-integer-float", "decimal"):
            data = series.to_numpy(dtype=np.float64, na_value=np.nan)
            return NUMBER, data, missing | np.isnan(data)
        if inferred == "boolean":
            return BOOL, series.to_numpy(dtype=bool, na_value=False), missing
        if inferred != "string":
            return f"mixed or unsupported values in an object column (pandas infers {inferred!r})"
        return STRING, series.to_numpy(dtype=object, na_value=""), missing
    if pd.api.types.is_string_dtype(dtype):
        # Missing strings become "" so that ordering comparisons never meet NaN or None.
        return STRING, series.to_numpy(dtype=object, na_value=""), series.isna().to_numpy(dtype=bool)
    return f"type {dtype}"


class _Env:
    """Columns of one frame, read and converted once per evaluate call."""

    __slots__ = ("compiled", "frame", "n", "cache", "expected")

    def __init__(self, compiled: CompiledExpression, frame: Any, n: int):
        self.compiled, self.frame, self.n = compiled, frame, n
        self.cache: dict[str, _Value] = {}
        self.expected = {name: use.kind for name, use in compiled._uses.items()}

    def fail(self, what: str, position: int, hint: str | None = None) -> NoReturn:
        compiled = self.compiled
        raise ExpressionError(_format_problem(compiled.key_path, compiled.text, what, position, hint))

    def name_of(self, node: _Node) -> str:
        return node.name if isinstance(node, _Column) else self.compiled.text[node.start : node.end]

    def raw_column(self, name: str) -> _Value:
        value = self.cache.get(name)
        if value is not None:
            return value
        position = self.compiled._positions[name]
        try:
            data = self.frame[name]
        except (KeyError, IndexError):
            self.fail(f"column {_snip(name)} is not in the data", position)
        if isinstance(data, pd.DataFrame):
            self.fail(f"column {_snip(name)} appears more than once in the data", position)
        series = data if isinstance(data, pd.Series) else pd.Series(data, copy=False)
        if len(series) != self.n:
            self.fail(f"column {_snip(name)} has {len(series)} values, not {self.n}", position)
        classified = _classify(series)
        if isinstance(classified, str):
            self.fail(
                f"column {_snip(name)} has {classified}",
                position,
                "expressions work on number, string and true/false columns",
            )
        value = _Value(*classified)
        self.cache[name] = value
        return value

    def column(self, name: str) -> _Value:
        value = self.raw_column(name)
        if value.kind == EMPTY and name in self.expected:
            # An all-missing column takes the type its use asks for, so every operator sees
            # operands of the right type; the result is unknown throughout anyway.
            return _all_unknown(self.expected[name], value.missing)
        return value


def _type_hint(found: str, wanted: str) -> str:
    if found == NUMBER and wanted == STRING:
        return "write the value without quotes, or declare and read the column as a string"
    if found == STRING and wanted == NUMBER:
        return "put the value in quotes, or declare and read the column as a number"
    if wanted == BOOL:
        return "only a true/false column can stand alone as a condition; compare it with a value instead"
    if found == BOOL:
        return "compare it with true or false, or use it directly as a condition"
    return "a column holds one type: numbers, strings or true/false values"


def _frame_length(frame: Any, names: frozenset[str]) -> int:
    if isinstance(frame, pd.DataFrame):
        return len(frame)
    if isinstance(frame, Mapping):
        for name in sorted(names):
            if name in frame:
                return len(frame[name])
        for values in frame.values():
            return len(values)
        raise ValueError("cannot tell the number of records: the mapping holds no columns")
    raise TypeError(
        f"frame must be a pandas DataFrame or a mapping of column name to values, not {type(frame).__name__}"
    )


# --------------------------------------------------------------------------------------------
# Public surface


@dataclass(frozen=True)
class CompiledExpression:
    """A checked expression, ready to evaluate over batches of records.

    `columns` holds every column the expression reads (including is_missing arguments).
    """

    text: str
    columns: frozenset[str]
    key_path: str = "expression"
    _root: _Node = field(default=None, repr=False, compare=False)
    _uses: dict[str, _Use] = field(default_factory=dict, repr=False, compare=False)
    _positions: dict[str, int] = field(default_factory=dict, repr=False, compare=False)

    def evaluate(self, frame: Any) -> np.ndarray:
        """Boolean array, one entry per record: True where the expression is true. Unknown
        (a missing value involved, division by zero) counts as False."""
        selected, _ = self.evaluate_three_valued(frame)
        return selected

    def evaluate_three_valued(self, frame: Any) -> tuple[np.ndarray, np.ndarray]:
        """(true, unknown): two boolean arrays; a record where neither is set is false."""
        n = _frame_length(frame, self.columns)
        env = _Env(self, frame, n)
        problems = []
        for name in sorted(self._uses, key=self._positions.__getitem__):
            use = self._uses[name]
            found = env.raw_column(name).kind
            if found not in (use.kind, EMPTY):
                problems.append(
                    _format_problem(
                        self.key_path,
                        self.text,
                        f"column {_snip(name)} holds {_PLURAL[found]} but {use.usage}",
                        use.position,
                        _type_hint(found, use.kind),
                    )
                )
        if problems:
            _raise_problems(self.key_path, self.text, problems)
        with np.errstate(all="ignore"):  # NaN placeholders and x/0 are masked as unknown anyway
            value = self._root.evaluate(env)
        unknown = np.array(np.broadcast_to(value.missing, (n,)), dtype=bool)
        true = np.logical_and(np.broadcast_to(value.data, (n,)), np.logical_not(unknown))
        return true, unknown


def compile_expression(text: str, *, columns: Collection[str], key_path: str = "expression") -> CompiledExpression:
    """Parse and check `text` against the declared `columns`; raise ExpressionError naming
    `key_path` when it is not a valid true/false expression of the safe language."""
    if isinstance(columns, str):
        raise TypeError("columns must be a collection of column names, not a single string")
    if not isinstance(text, str):
        raise ExpressionError(
            f"{key_path}: expected an expression in quotes, got {type(text).__name__} {text!r}: "
            "write a condition such as \"age >= 15\""
        )
    declared = frozenset(columns)
    root = _Parser(text, key_path, declared).parse()

    nodes = _walk(root)
    if max(depth for _, depth in nodes) > _MAX_DEPTH:
        raise ExpressionError(
            _format_problem(
                key_path, text, "expression is too long or deep", root.start, f"at most {_MAX_DEPTH} levels"
            )
        )

    positions: dict[str, int] = {}
    for node, _ in nodes:
        if isinstance(node, _Column):
            positions.setdefault(node.name, node.start)
    problems = [
        _unknown_column_problem(name, position, declared, key_path, text)
        for name, position in positions.items()
        if name not in declared
    ]

    checker = _Checker(text, key_path)
    checker.need(
        root,
        BOOL,
        "the whole expression must be a true/false condition, e.g. a comparison such as 'age >= 15'",
        "is used as the whole condition",
    )
    problems.extend(checker.problems)
    if problems:
        _raise_problems(key_path, text, problems)
    return CompiledExpression(text, frozenset(positions), key_path, root, checker.uses, positions)
