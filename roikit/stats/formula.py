"""The formula gate: every model formula roikit accepts is parsed here, by roikit's own small grammar.

A formula is data wherever it comes from (command line, study file, Python, a notebook parameter), so no part of
the user's text is ever handed to anything that evaluates it. :func:`parse_formula` reads the text into a tree
of a small grammar, expands it into terms (bounded before any expansion happens) and :meth:`Formula.design`
builds the design matrix.

Grammar (precedence from loose to tight)::

    formula  := [ "value" ] "~" sum   |   sum            (the left-hand side, when given, must be ``value``)
    sum      := product { ("+" | "-") product }          (a leading "-1" / "-0" is allowed)
    product  := nest { ("*" | "/") nest }                 a*b = a + b + a:b;  a/b = a + a:b
    nest     := power { ":" power }                       interaction
    power    := atom [ "**" INTEGER ]                     (a + b + c)**2: all interactions up to order 2
    atom     := NAME | `any name` | 0 | 1 | "(" sum ")" | TRANSFORM "(" NAME ")"

``NAME`` is a column (of the values table, participants.tsv, ...); a column name with other characters (spaces,
dots) is written in backquotes. The transforms (:data:`TRANSFORMS`) take exactly one column:

- ``C(x)``: x as a categorical variable (treatment coding, first level as reference), also when it is numeric;
- ``log(x)``: natural logarithm (every value must be > 0);
- ``center(x)``: x minus its mean;
- ``scale(x)`` / ``standardize(x)``: (x - mean) / SD (SD with n - 1).

Means and SDs are taken over the rows that enter the model (after exclusions). Anything else -- attribute access
(``np.log``), ``I(...)``, strings, commas, braces, numbers other than ``0``/``1`` as terms, nested transforms --
is refused with :class:`~roikit.errors.UsageError`.

Why the design matrix is built the way it is: the expanded terms are regenerated as a *canonical* formula string
that contains only ``1``/``0``, ``+``, ``:``, ``C(...)`` and synthetic identifiers of the form
``_roikitfactor<number>_`` (chosen by roikit; they never contain user text). The data frame given to the formula
library holds only the columns roikit computed itself under those identifiers (raw column, log, centred,
scaled). The library then only looks the identifiers up in that frame and applies its treatment coding; the
column names it reports are mapped back to the user's names afterwards. That keeps the library's well-tested
coding of categorical variables and interactions (reduced or full rank, column order, ``[T.level]`` names that
the reference tests and reports depend on) while no character typed by a user is ever evaluated, and a column
name can be anything (spaces, dots, Python keywords) without being read as code.

The size of the model is bounded before anything is built: the power of a sum (at most :data:`MAX_POWER`), the
number of terms after expansion (:data:`MAX_TERMS`, checked at every step of the expansion) and the number of
design-matrix columns, counted from the number of levels of each categorical variable (:data:`MAX_COLUMNS`).
"""

from __future__ import annotations

import keyword
import re
from dataclasses import dataclass
from typing import Iterable

import numpy as np
import pandas as pd

from .._options import noun, plural
from ..errors import DesignError, UsageError

__all__ = ["TRANSFORMS", "MAX_TERMS", "MAX_COLUMNS", "MAX_POWER", "Formula", "parse_formula", "formula_problems"]

#: Transforms a formula may apply to one column.
TRANSFORMS = ("C", "center", "log", "scale", "standardize")
#: Most terms a formula may expand to (intercept included).
MAX_TERMS = 256
#: Most columns a design matrix may have.
MAX_COLUMNS = 1000
#: Largest exponent of ``(a + b + ...)**n``.
MAX_POWER = 8
#: Longest formula text accepted (characters).
MAX_LENGTH = 4000

_TOKEN = re.compile(
    r"\s*(?:(?P<number>(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?)"
    r"|(?P<name>[A-Za-z_][A-Za-z0-9_.]*)"
    r"|(?P<quoted>`[^`]*`)"
    r"|(?P<op>\*\*|[~+\-*:/()]))"
)
_ALLOWED = "column names (`in backquotes` when they contain other characters), 0, 1, ~ + - * : / ** ( ) and " \
           "the transforms " + ", ".join(TRANSFORMS)


class FormulaError(UsageError):
    """A formula is refused by the gate (message names the formula and the problem)."""


# --------------------------------------------------------------------------------------------- factors and terms
@dataclass(frozen=True)
class Factor:
    """One variable of a term: a column, possibly transformed (``kind`` is ``""`` for the raw column)."""

    column: str
    kind: str = ""

    @property
    def label(self) -> str:
        """How the factor is written in names (``age``, ``log(age)``, ``C(site)``, ``my col``)."""
        return f"{self.kind}({self.column})" if self.kind else self.column


def _add(terms: list, new: Iterable) -> list:
    seen = {frozenset(t) for t in terms}
    out = list(terms)
    for t in new:
        key = frozenset(t)
        if key not in seen:
            seen.add(key)
            out.append(t)
    return out


def _check_size(n: int, text: str) -> None:
    if n > MAX_TERMS:
        raise FormulaError(
            f"formula {text!r} expands to more than {MAX_TERMS} terms; roikit refuses models this large "
            "(write fewer interactions, e.g. (a + b + c)**2 instead of a*b*c*d*e)"
        )


def _interact(left: list, right: list, text: str) -> list:
    if len(left) * len(right) > MAX_TERMS * MAX_TERMS:
        _check_size(len(left) * len(right), text)
    out: list = []
    for a in left:
        for b in right:
            t = tuple(a) + tuple(f for f in b if f not in a)
            out = _add(out, [t])
            _check_size(len(out), text)
    return out


# --------------------------------------------------------------------------------------------- tokenising
def _tokens(text: str, what: str) -> list[tuple[str, str]]:
    out = []
    pos = 0
    stripped = text.rstrip()
    while pos < len(stripped):
        m = _TOKEN.match(stripped, pos)
        if not m or m.end() == pos:
            bad = stripped[pos:].lstrip()[:1]
            raise FormulaError(f"{what} {text!r}: token {bad!r} is not allowed in a formula (allowed: {_ALLOWED})")
        kind = m.lastgroup
        tok = m.group(kind)
        if kind == "name" and "." in tok:
            raise FormulaError(f"{what} {text!r}: token '.' is not allowed in a formula ({tok!r}; attribute access "
                               "is not part of the formula language; a column with a dot in its name is written "
                               f"in backquotes, `{tok}`)")
        if kind == "quoted" and not tok.strip("`"):
            raise FormulaError(f"{what} {text!r}: empty backquotes")
        out.append((kind, tok))
        pos = m.end()
    return out


# --------------------------------------------------------------------------------------------- parsing
class _Parser:
    """Recursive descent over the tokens; returns the expanded terms and the intercept."""

    def __init__(self, tokens, text, what, columns):
        self.toks = tokens
        self.i = 0
        self.text = text
        self.what = what
        self.columns = columns
        self.problems: list[str] = []

    def err(self, message):
        raise FormulaError(f"{self.what} {self.text!r}: {message}")

    def peek(self):
        return self.toks[self.i] if self.i < len(self.toks) else (None, None)

    def take(self):
        tok = self.peek()
        self.i += 1
        return tok

    # top level: a sum whose 0/1 summands switch the intercept
    def top(self) -> tuple[list, bool]:
        intercept = True
        terms: list = []
        sign = "+"
        kind, tok = self.peek()
        if tok in ("+", "-"):
            sign = self.take()[1]
        while True:
            kind, tok = self.peek()
            if kind == "number" and tok in ("0", "1") and self._ends_summand(self.i + 1):
                self.take()
                intercept = (tok == "1") == (sign == "+")
            else:
                part = self.product()
                if sign == "+":
                    terms = _add(terms, part)
                else:
                    drop = {frozenset(t) for t in part}
                    if frozenset() in drop:
                        intercept = False
                    terms = [t for t in terms if frozenset(t) not in drop]
                _check_size(len(terms), self.text)
            kind, tok = self.peek()
            if tok in ("+", "-"):
                sign = self.take()[1]
                continue
            if tok is None:
                break
            if tok == ")":
                self.err("unbalanced ')'")
            self.err(f"unexpected {tok!r}")
        if () in terms or any(len(t) == 0 for t in terms):
            terms = [t for t in terms if len(t)]
            intercept = True
        return terms, intercept

    def _ends_summand(self, j):
        return j >= len(self.toks) or self.toks[j][1] in ("+", "-", ")")

    def sum(self) -> list:
        terms = self.product()
        while self.peek()[1] in ("+", "-"):
            op = self.take()[1]
            part = self.product()
            if op == "+":
                terms = _add(terms, part)
            else:
                drop = {frozenset(t) for t in part}
                terms = [t for t in terms if frozenset(t) not in drop]
            _check_size(len(terms), self.text)
        return terms

    def product(self) -> list:
        terms = self.nest()
        while self.peek()[1] in ("*", "/"):
            op = self.take()[1]
            right = self.nest()
            if op == "*":
                terms = _add(_add(terms, right), _interact(terms, right, self.text))
            else:
                whole = tuple(dict.fromkeys(f for t in terms for f in t))
                terms = _add(terms, _interact([whole], right, self.text))
            _check_size(len(terms), self.text)
        return terms

    def nest(self) -> list:
        terms = self.power()
        while self.peek()[1] == ":":
            self.take()
            terms = _interact(terms, self.power(), self.text)
        return terms

    def power(self) -> list:
        terms = self.atom()
        if self.peek()[1] == "**":
            self.take()
            kind, tok = self.take()
            if kind != "number" or not re.fullmatch(r"\d+", tok or ""):
                self.err(f"'**' must be followed by a whole number (e.g. (a + b)**2), found {tok!r}")
            n = int(tok)
            if n < 1 or n > MAX_POWER:
                self.err(f"power {tok} is out of range; '**' takes a whole number from 1 to {MAX_POWER} "
                         f"(interactions of up to {MAX_POWER} variables), e.g. (a + b + c)**2")
            result = terms
            for _ in range(n - 1):
                grown = _add(result, _interact(result, terms, self.text))
                _check_size(len(grown), self.text)
                if len(grown) == len(result):
                    break  # saturated: higher powers add nothing
                result = grown
            terms = result
        return terms

    def atom(self) -> list:
        kind, tok = self.take()
        if tok is None:
            self.err("ends too early (a term is missing after the last operator)")
        if tok == "(":
            terms = self.sum()
            if self.take()[1] != ")":
                self.err("unbalanced '('")
            return terms
        if kind == "number":
            if tok == "1":
                return [()]
            if tok == "0":
                self.err("'0' (no intercept) may only be added or subtracted at the top level, e.g. 'value ~ 0 + age'")
            self.err(f"the number {tok} is not a term; only 0 and 1 (no intercept / intercept) may appear, and a "
                     "whole number after '**'")
        if kind == "quoted":
            return [(Factor(self._column(tok[1:-1], tok)),)]
        if kind == "name":
            if self.peek()[1] == "(":
                if tok not in TRANSFORMS:
                    from difflib import get_close_matches

                    close = get_close_matches(tok, TRANSFORMS, n=1, cutoff=0.6)
                    hint = f"; did you mean {close[0]!r}?" if close else ""
                    self.problems.append(f"{self.what} {self.text!r}: {tok!r} is not an allowed transform "
                                         f"(allowed: {', '.join(TRANSFORMS)}){hint}")
                    self.take()  # keep reading, to report every problem at once; the result is never used
                    terms = self.sum()
                    if self.take()[1] != ")":
                        self.err("unbalanced '('")
                    return terms
                self.take()
                k2, inner = self.take()
                if k2 == "quoted":
                    column = self._column(inner[1:-1], inner)
                elif k2 == "name" and self.peek()[1] != "(":
                    column = self._column(inner, inner)
                else:
                    self.err(f"{tok}(...) takes one column name, found {inner!r}")
                close_kind, close = self.take()
                if close != ")":
                    self.err(f"{tok}(...) takes exactly one column name; found {close!r} after {inner!r}"
                             + (" (unbalanced '(')" if close is None else ""))
                return [(Factor(column, tok),)]
            return [(Factor(self._column(tok, tok)),)]
        if tok == ")":
            self.err("unbalanced ')'")
        self.err(f"unexpected {tok!r} where a term was expected")

    def _column(self, name: str, written: str) -> str:
        if self.columns is not None and name not in self.columns:
            from difflib import get_close_matches

            close = get_close_matches(name, list(self.columns), n=1, cutoff=0.6)
            listed = ", ".join(list(self.columns)[:20]) or "none"
            self.problems.append(f"{self.what} {self.text!r}: {written!r} is not a column of the tables the formula "
                                 f"may name" + (f"; did you mean {close[0]!r}?" if close else "")
                                 + f" (columns: {listed})")
        return name


# --------------------------------------------------------------------------------------------- the parsed formula
@dataclass(frozen=True)
class Formula:
    """A formula that passed the gate.

    Attributes
    ----------
    text : str
        What the user wrote.
    terms : tuple of tuple of Factor
        Expanded terms in formula-library order (by degree, then as written), intercept excluded.
    intercept : bool
    """

    text: str
    terms: tuple
    intercept: bool
    parameter: str = "formula"

    @property
    def variables(self) -> list[str]:
        """Columns named anywhere in the formula, in order of appearance."""
        return list(dict.fromkeys(f.column for t in self.terms for f in t))

    @property
    def factors(self) -> list[Factor]:
        return list(dict.fromkeys(f for t in self.terms for f in t))

    @property
    def rhs(self) -> str:
        """Canonical right-hand side in the user's names, e.g. ``1 + age + C(site) + age:C(site)``."""
        parts = (["1"] if self.intercept else ["0"]) + [":".join(_written(f) for f in t) for t in self.terms]
        return " + ".join(parts)

    def count_columns(self, frame: pd.DataFrame) -> int:
        """Columns the design matrix will have at most (from the number of levels of each categorical factor)."""
        total = int(self.intercept)
        for t in self.terms:
            n = 1
            for f in t:
                if _categorical(f, frame):
                    n *= max(int(frame[f.column].nunique(dropna=True)), 1)
                    if n > MAX_COLUMNS:
                        break
            total += n
            if total > MAX_COLUMNS:
                break
        return total

    def design(
        self,
        frame: pd.DataFrame,
        *,
        center: bool | Iterable[str] = False,
        error: type = DesignError,
        context: str | None = None,
        groups=None,
        means: dict | None = None,
    ) -> tuple[np.ndarray, list[str], dict[str, list[int]], list[str]]:
        """Design matrix of the formula on ``frame``.

        Parameters
        ----------
        frame : DataFrame
            Rows of the model; must hold every column of :attr:`variables` (raw values, not transformed).
        center : bool or iterable of str
            Mean-centre the numeric raw and ``log`` factors (True), or only those of the listed columns.
        error : exception class
            Raised (with a message naming the formula) when the data cannot give a design (a log of a
            non-positive value, a categorical variable with one level, ...).
        groups : array-like, optional
            One label per row (e.g. the region): centring and scaling then use each group's own mean and SD, so
            the design of one group depends on that group's rows only.
        means : dict, optional
            Filled with the subtracted means of the centred factors: label -> Series indexed by group (or a
            one-element Series indexed by ``"all"`` without ``groups``).

        Returns
        -------
        X : ndarray (rows x columns), names : list of column names, terms : term -> column indices,
        centred : the factor labels that were mean-centred.
        """
        import formulaic

        where = context or f"{self.parameter} {self.text!r}"
        missing = [v for v in self.variables if v not in frame.columns]
        if missing:
            raise error(f"{where}: {noun(missing, 'column')} {', '.join(missing)} not found in the data")
        if not self.terms and not self.intercept:
            raise UsageError(f"{where}: the model has no terms (no intercept and no predictors); write e.g. "
                             "'value ~ 1' or 'value ~ age'")
        n_cols = self.count_columns(frame)
        if n_cols > MAX_COLUMNS:
            raise FormulaError(f"{where}: the design would have more than {MAX_COLUMNS} columns (categorical "
                               "variables with many levels, interacted); use fewer levels or interactions")
        centre_set = None if isinstance(center, bool) else set(center)
        group_key = (pd.Series(np.asarray(groups, dtype=object)) if groups is not None
                     else pd.Series(np.full(len(frame), "all", dtype=object)))

        def group_mean(x: np.ndarray) -> tuple[np.ndarray, pd.Series]:
            by = pd.Series(x).groupby(group_key, sort=False)
            return by.transform("mean").to_numpy(float), by.mean()

        data: dict[str, np.ndarray | pd.Series] = {}
        ident: dict[Factor, str] = {}
        back: dict[str, str] = {}
        centred: list[str] = []
        for i, f in enumerate(self.factors):
            key = f"_roikitfactor{i}_"
            ident[f] = key
            back[key] = f.column if f.kind == "C" else f.label  # the library writes C(...) around it
            col = frame[f.column].reset_index(drop=True)
            if f.kind == "C" or (not f.kind and _categorical(f, frame)):
                data[key] = col
                continue
            number = pd.to_numeric(col, errors="coerce")
            text = col.notna() & number.isna()
            if text.any():
                raise error(f"{where}: {f.label} needs a numeric column, but {f.column!r} holds text (e.g. "
                            f"{str(col[text].iloc[0])!r}); use C({f.column}) for a categorical variable")
            x = number.astype(float).to_numpy()
            if f.kind == "log":
                bad = np.isfinite(x) & ~(x > 0)
                if bad.any():
                    raise error(f"{where}: log({f.column}) needs values > 0; found {x[bad][0]:g} in "
                                f"{plural(int(bad.sum()), 'row')}; use a column with positive values or drop log()")
                with np.errstate(all="ignore"):
                    x = np.log(x)
            if f.kind in ("center", "scale", "standardize"):
                x = x - group_mean(x)[0]
                if f.kind != "center":
                    sd = pd.Series(x).groupby(group_key, sort=False).transform("std").to_numpy(float)
                    if not np.all(np.isfinite(sd[np.isfinite(x)]) & (sd[np.isfinite(x)] > 0)):
                        raise error(f"{where}: {f.label}: {f.column!r} does not vary (SD 0 or undefined); "
                                    "drop the term or use center()")
                    x = x / sd
            elif center is True or (centre_set is not None and f.column in centre_set):
                if np.isfinite(x).any():
                    subtract, by_group = group_mean(x)
                    x = x - subtract
                    centred.append(f.label)
                    if means is not None:
                        means[f.label] = by_group
            data[key] = x
        canonical = " + ".join(
            (["1"] if self.intercept else ["0"])
            + [":".join(f"C({ident[f]})" if f.kind == "C" else ident[f] for f in t) for t in self.terms]
        )
        model_frame = pd.DataFrame(data, index=range(len(frame)))
        try:
            mm = formulaic.model_matrix(canonical, model_frame, na_action="raise")
        except Exception as exc:  # formulaic raises several kinds of errors on data problems
            message = _rename(str(exc), back)
            raise error(f"{where}: cannot build the design matrix ({message}); check that categorical columns "
                        "have at least two levels and that the columns hold values") from None
        names = [_rename(str(c), back) for c in mm.columns]
        terms = {_rename(str(t), back): list(idx) for t, idx in mm.model_spec.term_indices.items()}
        return mm.to_numpy(dtype=float), names, terms, centred


def _written(f: Factor) -> str:
    col = f.column if _is_identifier(f.column) else f"`{f.column}`"
    return f"{f.kind}({col})" if f.kind else col


def _is_identifier(name: str) -> bool:
    return name.isidentifier() and not keyword.iskeyword(name) and name.isascii()


def _categorical(f: Factor, frame: pd.DataFrame) -> bool:
    if f.kind == "C":
        return True
    if f.kind:
        return False
    col = frame[f.column]
    return not (pd.api.types.is_numeric_dtype(col) and not pd.api.types.is_bool_dtype(col))


_IDENT = re.compile(r"_roikitfactor\d+_")


def _rename(text: str, back: dict[str, str]) -> str:
    """Map the synthetic identifiers in a formula-library name back to the factor labels."""
    return _IDENT.sub(lambda m: back.get(m.group(0), m.group(0)), text)


# --------------------------------------------------------------------------------------------- entry points
def parse_formula(
    formula: str,
    *,
    parameter: str = "formula",
    columns: Iterable[str] | None = None,
    tilde: bool | None = None,
) -> Formula:
    """Parse ``formula`` through the gate; raise :class:`~roikit.errors.UsageError` when it is refused.

    Parameters
    ----------
    formula : str
        ``"value ~ age + group"`` (or, for random terms, ``"1 + contrast"``).
    parameter : str
        Name used in messages (``"formula"``, ``"random"``, ``"--formula"``).
    columns : iterable of str, optional
        When given, every named column must be one of these.
    tilde : bool or None
        True: ``~`` is required; False: ``~`` is refused (terms only); None: either.

    Examples
    --------
    >>> parse_formula("value ~ age * C(group)").rhs
    '1 + age + C(group) + age:C(group)'
    """
    problems, parsed = _parse(formula, parameter=parameter, columns=columns, tilde=tilde)
    if problems:
        raise FormulaError("; ".join(problems))
    return parsed


def formula_problems(
    formula, columns: Iterable[str] | None = None, *, what: str = "formula", allow_tilde: bool = True
) -> list[str]:
    """Every problem the gate finds in ``formula`` (empty list: accepted); for validators that list all problems."""
    problems, _ = _parse(formula, parameter=what, columns=columns, tilde=None if allow_tilde else False)
    return problems


def _parse(formula, *, parameter, columns, tilde):
    what = parameter
    if not isinstance(formula, str) or not formula.strip():
        return [f"{what} must be a non-empty string, e.g. 'value ~ age + group'; got {formula!r}"], None
    if len(formula) > MAX_LENGTH:
        return [f"{what}: the formula is {len(formula)} characters long; at most {MAX_LENGTH} are accepted"], None
    columns = None if columns is None else [str(c) for c in columns]
    try:
        tokens = _tokens(formula, what)
    except FormulaError as exc:
        return [str(exc)], None
    n_tilde = sum(1 for _, t in tokens if t == "~")
    if n_tilde and tilde is False:
        return [f"{what} {formula!r}: '~' is not allowed here (write the terms only, e.g. '1 + contrast')"], None
    if n_tilde > 1:
        return [f"{what} {formula!r}: '~' appears {n_tilde} times; write one 'value ~ terms'"], None
    if n_tilde == 0 and tilde is True:
        return [f"{what} {formula!r}: write the formula as 'value ~ terms', e.g. 'value ~ age + group'"], None
    if n_tilde == 1:
        at = [t for _, t in tokens].index("~")
        lhs = [t for _, t in tokens[:at]]
        if lhs not in ([], ["value"]):
            return [f"{what} {formula!r}: the left-hand side must be 'value' (the region value), found "
                    f"{' '.join(lhs)!r}"], None
        tokens = tokens[at + 1:]
    if not tokens:
        return [f"{what} {formula!r}: empty right-hand side; write e.g. 'value ~ 1' or 'value ~ age'"], None
    depth = 0
    for _, t in tokens:
        depth += (t == "(") - (t == ")")
        if depth < 0:
            return [f"{what} {formula!r}: unbalanced ')'"], None
    if depth > 0:
        return [f"{what} {formula!r}: unbalanced '('"], None
    parser = _Parser(tokens, formula, what, None if columns is None else set(columns))
    try:
        terms, intercept = parser.top()
    except FormulaError as exc:
        return [str(exc)], None
    if not terms and not intercept:
        example = "'1' or '1 + contrast'" if "random" in what else "'value ~ 1' or 'value ~ age'"
        return [f"{what} {formula!r}: the model has no terms (no intercept and no predictors); write e.g. "
                f"{example}"], None
    ordered = tuple(sorted(terms, key=len))  # by degree, stable: the formula library's order
    return parser.problems, Formula(text=formula, terms=ordered, intercept=intercept, parameter=parameter)
