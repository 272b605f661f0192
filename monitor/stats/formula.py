"""Wilkinson–Rogers model formulas: parsing and a fixed design encoding.

A formula is config text, so it is parsed by a small recursive-descent parser
and evaluated by walking its tree: nothing in it is ever handed to ``eval``.

Grammar (``:`` binds tighter than ``*``, which binds tighter than ``+``/``-``)::

    formula   := response "~" terms
    terms     := product (("+" | "-") product)*
    product   := inter ("*" inter)*          a*b  ==  a + b + a:b
    inter     := atom (":" atom)*
    atom      := "(" terms ")" | "0" | "1" | factor
    factor    := NAME | FUNC "(" NAME ")" | "I(" arithmetic ")" | "C(" NAME ")"

``- 1``, ``+ 0`` or a leading ``0 +`` remove the intercept; ``- term`` removes a
term.  ``FUNC`` is one of :data:`NUMERIC_FUNCTIONS`.  Inside ``I(...)`` only
numbers, column names, ``+ - * / **`` (``^`` is read as ``**``), parentheses and
the same functions are allowed.

Coding of categorical columns (text columns, or any column wrapped in ``C()``):
treatment contrasts against a reference level.  A categorical factor of a term is
coded in full (one column per level) when the term without that factor is not
already spanned by an earlier term (for example the first categorical term of a
model without intercept), otherwise without its reference level; this keeps the
design full rank in the usual cases.  Levels are the sorted distinct values of
the data the encoding is first fitted on, unless declared; the reference is the
first level unless declared.  The encoding is then frozen: every chunk and every
later night uses the same columns.  A value outside the frozen levels is counted
per column and the row is left out of the fit; it is never encoded as zeros.

Column labels: ``Intercept``; a column's name; a transform as written without
spaces (``log(x)``, ``I(x**2)``); a categorical level as ``name[level]``;
interactions join their factors' labels with ``:``.
"""

from __future__ import annotations

import math
import re
from collections.abc import Mapping, Sequence
from dataclasses import dataclass, field
from typing import Any

import numpy as np
import pandas as pd

from ..errors import DataValidationError, FormulaError

__all__ = [
    "NUMERIC_FUNCTIONS",
    "CategoricalSpec",
    "ColumnSpec",
    "Design",
    "EncodedChunk",
    "Factor",
    "ParsedFormula",
    "build_design",
    "parse_formula",
]

#: The whitelist of numeric transforms.  Anything else is refused.
NUMERIC_FUNCTIONS: dict[str, Any] = {
    "log": np.log,
    "log2": np.log2,
    "log10": np.log10,
    "log1p": np.log1p,
    "exp": np.exp,
    "sqrt": np.sqrt,
    "abs": np.abs,
}

_TOKEN = re.compile(
    r"\s*(?:(?P<number>\d+\.\d*(?:[eE][-+]?\d+)?|\.\d+(?:[eE][-+]?\d+)?|\d+(?:[eE][-+]?\d+)?)"
    r"|(?P<name>[A-Za-z_][A-Za-z_0-9.]*|`[^`]+`)"
    r"|(?P<op>\*\*|[~+\-*:/()^,]))"
)


@dataclass(frozen=True, slots=True)
class _Token:
    kind: str  # "number", "name", "op", "end"
    text: str
    position: int


def _tokenize(text: str) -> list[_Token]:
    tokens: list[_Token] = []
    position = 0
    while position < len(text):
        if text[position:].strip() == "":
            break
        match = _TOKEN.match(text, position)
        if match is None or match.end() == position:
            offending = position + (len(text[position:]) - len(text[position:].lstrip()))
            raise FormulaError(
                f"unexpected character {text[offending]!r}",
                formula=text,
                position=offending,
                hint="formulas use column names, numbers, + - * : ( ) ~ and whitelisted "
                "functions only",
            )
        kind = match.lastgroup or "op"
        token_text = match.group(kind)
        start = match.start(kind)
        if kind == "name" and token_text.startswith("`"):
            token_text = token_text[1:-1]
        tokens.append(_Token(kind, token_text, start))
        position = match.end()
    tokens.append(_Token("end", "", len(text)))
    return tokens


# ----------------------------------------------------------------------------------------
# Arithmetic inside I(...) and transforms: a tiny expression tree, evaluated by walking it.


@dataclass(frozen=True, slots=True)
class _Num:
    value: float


@dataclass(frozen=True, slots=True)
class _Var:
    name: str


@dataclass(frozen=True, slots=True)
class _Call:
    function: str
    argument: Any


@dataclass(frozen=True, slots=True)
class _BinOp:
    op: str
    left: Any
    right: Any


@dataclass(frozen=True, slots=True)
class _Neg:
    operand: Any


def _expression_columns(node: Any) -> tuple[str, ...]:
    if isinstance(node, _Var):
        return (node.name,)
    if isinstance(node, _Num):
        return ()
    if isinstance(node, _Call):
        return _expression_columns(node.argument)
    if isinstance(node, _Neg):
        return _expression_columns(node.operand)
    left = _expression_columns(node.left)
    return left + tuple(c for c in _expression_columns(node.right) if c not in left)


def _evaluate(node: Any, columns: Mapping[str, np.ndarray]) -> np.ndarray | float:
    if isinstance(node, _Num):
        return node.value
    if isinstance(node, _Var):
        return columns[node.name]
    if isinstance(node, _Call):
        return NUMERIC_FUNCTIONS[node.function](_evaluate(node.argument, columns))
    if isinstance(node, _Neg):
        return -_evaluate(node.operand, columns)
    left = _evaluate(node.left, columns)
    right = _evaluate(node.right, columns)
    if node.op == "+":
        return left + right
    if node.op == "-":
        return left - right
    if node.op == "*":
        return left * right
    if node.op == "/":
        return left / right
    return np.power(left, right)


# ----------------------------------------------------------------------------------------
# Formula tree


@dataclass(frozen=True, slots=True)
class Factor:
    """One factor of a term: a plain column, a numeric transform, or a categorical column.

    ``label`` is how the factor appears in column labels; ``columns`` the data
    columns it reads.
    """

    label: str
    columns: tuple[str, ...]
    is_categorical: bool
    expression: Any = field(default=None, compare=False, repr=False)


@dataclass(frozen=True, slots=True)
class ParsedFormula:
    """A parsed formula: response, ordered terms (tuples of factors), intercept flag."""

    text: str
    response: Factor
    terms: tuple[tuple[Factor, ...], ...]
    has_intercept: bool

    @property
    def columns(self) -> tuple[str, ...]:
        """Every data column the formula reads, response first, without repeats."""
        seen: list[str] = []
        for factor in (self.response, *(f for term in self.terms for f in term)):
            for column in factor.columns:
                if column not in seen:
                    seen.append(column)
        return tuple(seen)


class _Parser:
    def __init__(self, text: str) -> None:
        self.text = text
        self.tokens = _tokenize(text)
        self.index = 0

    # -- token helpers
    @property
    def current(self) -> _Token:
        return self.tokens[self.index]

    def _advance(self) -> _Token:
        token = self.tokens[self.index]
        self.index += 1
        return token

    def _error(self, what: str, token: _Token | None = None, hint: str | None = None) -> FormulaError:
        token = token or self.current
        return FormulaError(what, formula=self.text, position=token.position, hint=hint)

    def _expect(self, op: str) -> _Token:
        token = self.current
        if token.kind != "op" or token.text != op:
            found = "the end of the formula" if token.kind == "end" else repr(token.text)
            raise self._error(f"expected {op!r} but found {found}")
        return self._advance()

    # -- formula
    def parse(self) -> ParsedFormula:
        if not any(t.kind == "op" and t.text == "~" for t in self.tokens):
            raise FormulaError(
                "the formula has no response",
                formula=self.text,
                hint="write it as 'response ~ terms', e.g. 'load ~ temperature + wind'",
            )
        if self.current.kind == "op" and self.current.text == "~":
            raise self._error("the formula has no response before '~'",
                              hint="name the response column before '~'")
        response_terms, _ = self._terms()
        if len(response_terms) != 1 or len(response_terms[0][1]) != 1:
            raise FormulaError("the response must be a single column or transform",
                               formula=self.text, position=0,
                               hint="put one column (or one transform of it) before '~'")
        response = response_terms[0][1][0]
        if response.is_categorical:
            raise FormulaError("the response cannot be categorical", formula=self.text,
                               position=0, hint="regress a numeric column")
        self._expect("~")
        if self.current.kind == "end":
            raise self._error("nothing after '~'", hint="list the terms, e.g. 'y ~ x'")
        items, intercept_explicit = self._terms()
        if self.current.kind != "end":
            raise self._error(f"unexpected {self.current.text!r}",
                              hint="check for a missing '+' or an unbalanced ')'")
        has_intercept = True
        terms: list[tuple[Factor, ...]] = []
        for sign, term in items:
            if term == ():  # intercept marker (1 or 0 handled by sign)
                has_intercept = sign
                continue
            key = _term_key(term)
            existing = [t for t in terms if _term_key(t) == key]
            if sign and not existing:
                terms.append(term)
            elif not sign:
                terms = [t for t in terms if _term_key(t) != key]
        del intercept_explicit
        return ParsedFormula(self.text, response, tuple(terms), has_intercept)

    def _terms(self) -> tuple[list[tuple[bool, tuple[Factor, ...]]], bool]:
        """A sum of products; returns (sign, term) pairs in order.  () is the intercept."""
        items: list[tuple[bool, tuple[Factor, ...]]] = []
        sign = True
        explicit = False
        if self.current.kind == "op" and self.current.text == "-":
            self._advance()
            sign = False
        while True:
            for term in self._product():
                if term == ("zero",):
                    items.append((not sign, ()))
                    explicit = True
                elif term == ("one",):
                    items.append((sign, ()))
                    explicit = True
                else:
                    items.append((sign, term))
            token = self.current
            if token.kind == "op" and token.text in "+-" and token.text:
                self._advance()
                sign = token.text == "+"
                if self.current.kind == "end":
                    raise self._error(f"nothing after {token.text!r}")
                continue
            return items, explicit

    def _product(self) -> list[Any]:
        groups = [self._interaction()]
        while self.current.kind == "op" and self.current.text == "*":
            self._advance()
            groups.append(self._interaction())
        if len(groups) == 1:
            return groups[0]
        # a*b*c: every non-empty product of the groups' terms, in expansion order
        result: list[Any] = []
        for group in groups:
            if any(t in (("zero",), ("one",)) for t in group):
                raise self._error("0 and 1 cannot be multiplied",
                                  hint="write '- 1' or '0 +' to drop the intercept")
        expanded: list[tuple[Factor, ...]] = []
        for group in groups:
            new = list(group)
            for existing in list(expanded):
                for term in group:
                    new.append(_merge_terms(existing, term))
            for term in new:
                if _term_key(term) not in {_term_key(t) for t in expanded}:
                    expanded.append(term)
        result.extend(expanded)
        return result

    def _interaction(self) -> list[Any]:
        parts = [self._atom()]
        while self.current.kind == "op" and self.current.text == ":":
            self._advance()
            parts.append(self._atom())
        if len(parts) == 1:
            return parts[0]
        combined: list[tuple[Factor, ...]] = [()]
        for part in parts:
            if any(t in (("zero",), ("one",)) for t in part):
                raise self._error("0 and 1 cannot appear in an interaction")
            combined = [_merge_terms(a, b) for a in combined for b in part]
        return combined

    def _atom(self) -> list[Any]:
        token = self.current
        if token.kind == "op" and token.text == "(":
            self._advance()
            items, _ = self._terms()
            self._expect(")")
            if any(not sign for sign, _ in items):
                raise self._error("'-' inside parentheses is not supported", token)
            return [("one",) if t == () else t for _, t in items]
        if token.kind == "number":
            self._advance()
            if token.text in ("0", "1"):
                return [("zero",) if token.text == "0" else ("one",)]
            raise self._error(f"a bare number {token.text!r} is not a term", token,
                              hint="use I(...) for arithmetic, e.g. I(x**2)")
        if token.kind == "name":
            self._advance()
            if self.current.kind == "op" and self.current.text == "(":
                return [(self._call(token),)]
            return [(Factor(token.text, (token.text,), False, _Var(token.text)),)]
        if token.kind == "end":
            raise self._error("the formula ends too early")
        raise self._error(f"unexpected {token.text!r}")

    def _call(self, name: _Token) -> Factor:
        open_paren = self._expect("(")
        if name.text == "I":
            expression = self._arithmetic()
            close = self._expect(")")
            label = "I(" + re.sub(r"\s+", "", self.text[open_paren.position + 1 : close.position]) + ")"
            columns = _expression_columns(expression)
            if not columns:
                raise self._error("I(...) must use at least one column", name)
            return Factor(label.replace("^", "**"), columns, False, expression)
        if name.text == "C":
            column = self.current
            if column.kind != "name":
                raise self._error("C(...) takes one column name", column)
            self._advance()
            self._expect(")")
            return Factor(column.text, (column.text,), True, _Var(column.text))
        if name.text not in NUMERIC_FUNCTIONS:
            known = ", ".join(sorted([*NUMERIC_FUNCTIONS, "I", "C"]))
            raise self._error(f"unknown function {name.text!r}", name,
                              hint=f"the functions allowed in formulas are: {known}")
        argument = self._arithmetic()
        close = self._expect(")")
        inner = re.sub(r"\s+", "", self.text[open_paren.position + 1 : close.position])
        expression = _Call(name.text, argument)
        return Factor(f"{name.text}({inner})", _expression_columns(expression), False, expression)

    # -- arithmetic inside I() and transforms
    def _arithmetic(self) -> Any:
        node = self._arith_term()
        while self.current.kind == "op" and self.current.text in ("+", "-"):
            op = self._advance().text
            node = _BinOp(op, node, self._arith_term())
        return node

    def _arith_term(self) -> Any:
        node = self._arith_unary()
        while self.current.kind == "op" and self.current.text in ("*", "/"):
            op = self._advance().text
            node = _BinOp(op, node, self._arith_unary())
        return node

    def _arith_unary(self) -> Any:
        if self.current.kind == "op" and self.current.text == "-":
            self._advance()
            return _Neg(self._arith_unary())
        return self._arith_power()

    def _arith_power(self) -> Any:
        base = self._arith_primary()
        if self.current.kind == "op" and self.current.text in ("**", "^"):
            self._advance()
            return _BinOp("**", base, self._arith_unary())
        return base

    def _arith_primary(self) -> Any:
        token = self.current
        if token.kind == "number":
            self._advance()
            return _Num(float(token.text))
        if token.kind == "name":
            self._advance()
            if self.current.kind == "op" and self.current.text == "(":
                if token.text not in NUMERIC_FUNCTIONS:
                    known = ", ".join(sorted(NUMERIC_FUNCTIONS))
                    raise self._error(f"unknown function {token.text!r}", token,
                                      hint=f"inside I(...) the functions allowed are: {known}")
                self._advance()
                argument = self._arithmetic()
                self._expect(")")
                return _Call(token.text, argument)
            return _Var(token.text)
        if token.kind == "op" and token.text == "(":
            self._advance()
            node = self._arithmetic()
            self._expect(")")
            return node
        found = "the end of the formula" if token.kind == "end" else repr(token.text)
        raise self._error(f"expected a number, a column or '(' but found {found}")


def _term_key(term: tuple[Factor, ...]) -> frozenset[str]:
    return frozenset(f.label for f in term)


def _merge_terms(a: tuple[Factor, ...], b: tuple[Factor, ...]) -> tuple[Factor, ...]:
    labels = {f.label for f in a}
    return a + tuple(f for f in b if f.label not in labels)


def parse_formula(text: str) -> ParsedFormula:
    """Parse a formula; raise :class:`FormulaError` with the position of any problem."""
    if not isinstance(text, str) or not text.strip():
        raise FormulaError("the formula is empty", formula=str(text),
                           hint="write it as 'response ~ terms'")
    return _Parser(text).parse()


# ----------------------------------------------------------------------------------------
# Design: the frozen encoding


@dataclass(frozen=True, slots=True)
class CategoricalSpec:
    """Declared levels of a categorical column (optional; else taken from the data)."""

    levels: tuple[str, ...] | None = None
    reference: str | None = None


@dataclass(frozen=True, slots=True)
class ColumnSpec:
    """One design column: a product of factors, each categorical one at a fixed level."""

    label: str
    factors: tuple[tuple[Factor, str | None], ...]  # (factor, level or None for numeric)


@dataclass(frozen=True, slots=True)
class EncodedChunk:
    """The design rows of one chunk that every model can use, and what was left out.

    ``X`` holds the union design without an intercept column (the engine keeps
    its own); ``y`` the response.  ``usable`` marks the chunk's rows kept.
    """

    X: np.ndarray
    y: np.ndarray
    usable: np.ndarray
    dropped_rows: int
    dropped_by_column: dict[str, int]
    unseen_levels: dict[str, dict[str, int]]
    first_bad_row: dict[str, int]


@dataclass
class Design:
    """The frozen encoding of one or more formulas sharing a response.

    ``columns`` is the union of every formula's design columns (no intercept);
    ``models[i]`` lists, for formula ``i``, the indices into ``columns`` in the
    formula's order and whether it has an intercept.
    """

    formulas: tuple[ParsedFormula, ...]
    response: Factor
    columns: tuple[ColumnSpec, ...]
    models: tuple[tuple[tuple[int, ...], bool], ...]
    levels: dict[str, tuple[str, ...]]
    data_columns: tuple[str, ...]
    categorical_columns: frozenset[str]

    def labels(self, model: int) -> tuple[str, ...]:
        """Coefficient labels of one model, intercept first."""
        indices, has_intercept = self.models[model]
        labels = tuple(self.columns[i].label for i in indices)
        return ("Intercept", *labels) if has_intercept else labels

    def encode(self, data: Mapping[str, np.ndarray]) -> EncodedChunk:
        """Encode one chunk; rows with a missing, non-finite or unseen value are left out."""
        n = _chunk_length(data, self.data_columns)
        usable = np.ones(n, dtype=bool)
        dropped_by_column: dict[str, int] = {}
        first_bad_row: dict[str, int] = {}
        unseen: dict[str, dict[str, int]] = {}
        codes: dict[str, np.ndarray] = {}
        numeric: dict[str, np.ndarray] = {}
        for name in self.data_columns:
            values = data[name]
            if name in self.categorical_columns:
                text, missing = _as_text(values)
                # hash lookup in C: -1 for a value outside the frozen levels (and missing)
                code = pd.Index(self.levels[name], dtype=object).get_indexer(text).astype(
                    np.int64)
                code[missing] = -2
                bad = missing | (code < 0)
                unseen_mask = code == -1
                if unseen_mask.any():
                    values_unseen, counts = np.unique(text[unseen_mask].astype(str), return_counts=True)
                    unseen[name] = {str(v): int(c) for v, c in zip(values_unseen, counts, strict=True)}
                codes[name] = code
            else:
                array = _as_float(values, name)
                bad = ~np.isfinite(array)
                numeric[name] = array
            if bad.any():
                dropped_by_column[name] = int(bad.sum())
                first_bad_row[name] = int(np.argmax(bad))
                usable &= ~bad
        y = np.asarray(_evaluate(self.response.expression, numeric), dtype=np.float64)
        y = np.broadcast_to(y, (n,)).copy()
        X = np.empty((n, len(self.columns)), dtype=np.float64)
        with np.errstate(all="ignore"):
            evaluated: dict[str, np.ndarray] = {}
            for j, spec in enumerate(self.columns):
                column = np.ones(n, dtype=np.float64)
                for factor, level in spec.factors:
                    if factor.is_categorical:
                        level_code = self.levels[factor.columns[0]].index(level)  # type: ignore[arg-type]
                        column = column * (codes[factor.columns[0]] == level_code)
                    else:
                        if factor.label not in evaluated:
                            value = _evaluate(factor.expression, numeric)
                            evaluated[factor.label] = np.broadcast_to(
                                np.asarray(value, dtype=np.float64), (n,))
                        column = column * evaluated[factor.label]
                X[:, j] = column
        transform_bad = ~np.isfinite(y) & usable
        row_bad = ~np.isfinite(X).all(axis=1) & usable
        for label, bad in (("response " + self.response.label, transform_bad),
                           ("a transformed column", row_bad)):
            if bad.any():
                dropped_by_column[label] = dropped_by_column.get(label, 0) + int(bad.sum())
                first_bad_row.setdefault(label, int(np.argmax(bad)))
                usable &= ~bad
        dropped = int(n - usable.sum())
        if dropped:
            X = X[usable]
            y = y[usable]
        return EncodedChunk(X, y, usable, dropped, dropped_by_column, unseen, first_bad_row)


def _chunk_length(data: Mapping[str, np.ndarray], names: Sequence[str]) -> int:
    lengths = {len(data[name]) for name in names}
    if len(lengths) != 1:
        raise DataValidationError("columns of one chunk have different lengths",
                                  where=", ".join(names), hint="pass columns of equal length")
    return lengths.pop()


def _as_float(values: np.ndarray, name: str) -> np.ndarray:
    array = np.asarray(values)
    if array.dtype.kind in "fiub":
        return array.astype(np.float64, copy=False)
    if array.dtype.kind == "O":
        try:
            return np.array([np.nan if v is None else v for v in array], dtype=np.float64)
        except (TypeError, ValueError):
            pass
    sample = next((v for v in array if v is not None), None)
    raise DataValidationError(
        f"column {name!r} is not numeric (dtype {array.dtype}, e.g. {sample!r})",
        where=f"column {name!r}",
        hint=f"convert it upstream, or write C({name}) in the formula to treat it as categorical",
    )


def _as_text(values: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """Values of a categorical column as text (None where missing), and the missing mask."""
    array = np.asarray(values, dtype=object)
    missing = np.asarray(pd.isna(array), dtype=bool)
    if pd.api.types.infer_dtype(array, skipna=True) in ("string", "empty"):
        text = array.copy()
        text[missing] = None
        return text, missing
    text = np.array([None if m else _level_text(v) for v, m in zip(array, missing, strict=True)],
                    dtype=object)
    return text, missing


def _level_text(value: Any) -> str:
    """A level as text; whole numbers without a trailing '.0' (codes arrive as floats)."""
    if isinstance(value, (float, np.floating)) and math.isfinite(value) and float(value).is_integer():
        return str(int(value))
    if isinstance(value, np.integer):
        return str(int(value))
    return str(value)


def _level_order(level: str) -> tuple[int, float, str]:
    """Sort key of levels: numbers by value (so 2 before 10), then text."""
    try:
        return (0, float(level), level)
    except ValueError:
        return (1, 0.0, level)


def _is_text_column(values: np.ndarray) -> bool:
    array = np.asarray(values)
    return array.dtype.kind in "OUS"


def build_design(
    formulas: Sequence[str | ParsedFormula],
    data: Mapping[str, np.ndarray],
    *,
    categorical: Mapping[str, CategoricalSpec] | None = None,
) -> Design:
    """Freeze the encoding of one or more formulas on a first chunk of data.

    Parameters
    ----------
    formulas
        Formulas with the same response.
    data
        The first chunk: column name to a 1-D array (numeric, or text for
        categorical columns).  Levels of categorical columns come from it unless
        declared in ``categorical``.
    categorical
        Declared levels and reference level per categorical column.

    Raises
    ------
    FormulaError, DataValidationError, ConfigurationError
    """
    declared = dict(categorical or {})
    parsed = [f if isinstance(f, ParsedFormula) else parse_formula(f) for f in formulas]
    if not parsed:
        raise FormulaError("no formula given", formula="", hint="pass at least one formula")
    response = parsed[0].response
    data_columns: list[str] = []
    for formula in parsed:
        for column in formula.columns:
            if column not in data_columns:
                data_columns.append(column)
    missing = [c for c in data_columns if c not in data]
    if missing:
        available = ", ".join(sorted(map(str, data))[:20])
        raise DataValidationError(
            f"column {missing[0]!r} used by the formula is not in the data",
            where=f"formula {parsed[0].text!r}",
            hint=f"available columns: {available}",
        )
    categorical_columns: set[str] = set(declared)
    for formula in parsed:
        for term in formula.terms:
            for factor in term:
                if factor.is_categorical:
                    categorical_columns.add(factor.columns[0])
                elif _is_text_column(data[factor.columns[0]]) and isinstance(factor.expression, _Var):
                    categorical_columns.add(factor.columns[0])
    for formula in parsed:
        for column in formula.response.columns:
            if column in categorical_columns or _is_text_column(data[column]):
                raise DataValidationError(
                    f"the response column {column!r} is not numeric",
                    where=f"formula {formula.text!r}", hint="regress a numeric column")
        for term in formula.terms:
            for factor in term:
                if not isinstance(factor.expression, _Var):
                    for column in factor.columns:
                        if column in categorical_columns or _is_text_column(data[column]):
                            raise DataValidationError(
                                f"column {column!r} is text and cannot go into {factor.label}",
                                where=f"formula {formula.text!r}",
                                hint="transforms apply to numeric columns only")
    levels: dict[str, tuple[str, ...]] = {}
    for column in sorted(categorical_columns):
        spec = declared.get(column, CategoricalSpec())
        if spec.levels is not None:
            column_levels = tuple(_level_text(level) for level in spec.levels)
        else:
            text, missing_mask = _as_text(data[column])
            column_levels = tuple(sorted({str(v) for v in text[~missing_mask]}, key=_level_order))
        if not column_levels:
            raise DataValidationError(f"categorical column {column!r} has no values",
                                      where=f"column {column!r}",
                                      hint="declare its levels or pass rows with values")
        if spec.reference is not None:
            if spec.reference not in column_levels:
                raise DataValidationError(
                    f"reference level {spec.reference!r} is not a level of {column!r}",
                    where=f"column {column!r}", hint=f"levels: {', '.join(column_levels)}")
            column_levels = (spec.reference, *(lv for lv in column_levels if lv != spec.reference))
        levels[column] = column_levels

    def resolve(factor: Factor) -> Factor:
        if not factor.is_categorical and isinstance(factor.expression, _Var) and \
                factor.columns[0] in categorical_columns:
            return Factor(factor.label, factor.columns, True, factor.expression)
        return factor

    union: list[ColumnSpec] = []
    index_of: dict[str, int] = {}
    models: list[tuple[tuple[int, ...], bool]] = []
    for formula in parsed:
        indices: list[int] = []
        spanned: list[frozenset[str]] = [frozenset()] if formula.has_intercept else []
        for term in formula.terms:
            factors = tuple(resolve(f) for f in term)
            for spec in _term_columns(factors, spanned, levels):
                if spec.label not in index_of:
                    index_of[spec.label] = len(union)
                    union.append(spec)
                if index_of[spec.label] not in indices:
                    indices.append(index_of[spec.label])
            spanned.append(frozenset(f.label for f in factors))
        models.append((tuple(indices), formula.has_intercept))
    return Design(tuple(parsed), response, tuple(union), tuple(models), levels,
                  tuple(data_columns), frozenset(categorical_columns))


def _term_columns(
    factors: tuple[Factor, ...], spanned: list[frozenset[str]], levels: Mapping[str, tuple[str, ...]]
) -> list[ColumnSpec]:
    """Columns of one term; categorical factors coded in full or against the reference."""
    options: list[list[tuple[Factor, str | None]]] = []
    for factor in factors:
        if not factor.is_categorical:
            options.append([(factor, None)])
            continue
        rest = frozenset(f.label for f in factors if f is not factor)
        full = rest not in spanned
        column_levels = levels[factor.columns[0]]
        chosen = column_levels if full else column_levels[1:]
        options.append([(factor, level) for level in chosen])
    combos: list[tuple[tuple[Factor, str | None], ...]] = [()]
    for option in options:
        combos = [(*combo, choice) for choice in option for combo in combos]
    specs = []
    for combo in combos:
        ordered = tuple(sorted(combo, key=lambda fc: factors.index(fc[0])))
        label = ":".join(
            f"{f.label}[{level}]" if level is not None else f.label for f, level in ordered)
        specs.append(ColumnSpec(label, ordered))
    return specs
