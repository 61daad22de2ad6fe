"""Term text and the analyst's declarations.

Everything here is plain data: formula text in the open patsy/statsmodels syntax, never evaluated
by this module.  Column names are data too; they only ever reach formula text through
:func:`quote_name`, which wraps awkward names in ``Q("...")`` with a correctly escaped literal.
"""
from __future__ import annotations

import functools
import keyword
import re
from dataclasses import dataclass, field
from typing import Mapping, Sequence

import patsy

__all__ = ["quote_name", "Declarations", "split_formula", "normalise_term", "term_variables"]

_IDENT = re.compile(r"^[A-Za-z_][A-Za-z0-9_]*$")
# names patsy would read as something other than a plain variable
_RESERVED = {"Q", "C", "I", "np", "center", "standardize", "scale", "bs", "cr", "cc", "te"}


def quote_name(name: str) -> str:
    """Return formula text that refers to column ``name``.

    Plain identifiers are returned as they are; anything else (spaces, quotes, operators, keywords,
    non-ASCII, newlines) becomes ``Q("...")`` with a double-quoted Python literal in which
    backslashes, quotes and control characters are escaped, so the text can never break out of
    the string.
    """
    if not isinstance(name, str):
        raise TypeError(
            f"column names must be strings to be used in a formula, got {type(name).__name__}; "
            "rename the column (df.columns = df.columns.astype(str))"
        )
    if _IDENT.match(name) and not keyword.iskeyword(name) and name not in _RESERVED:
        return name
    return "Q(" + string_literal(name) + ")"


def string_literal(text: str) -> str:
    """A double-quoted Python string literal for ``text`` (ASCII only, fully escaped)."""
    out = ['"']
    for ch in text:
        code = ord(ch)
        if ch == "\\":
            out.append("\\\\")
        elif ch == '"':
            out.append('\\"')
        elif 32 <= code < 127:
            out.append(ch)
        elif code < 0x100:
            out.append(f"\\x{code:02x}")
        elif code < 0x10000:
            out.append(f"\\u{code:04x}")
        else:
            out.append(f"\\U{code:08x}")
    out.append('"')
    return "".join(out)


def split_formula(formula: str) -> tuple[str, list[str], bool]:
    """Split ``"y ~ a + b"`` into the response text, the right-hand term names and intercept flag.

    Term names are patsy's own spelling (``Term.name()``), in the formula's order, without the
    intercept.  Raises ``ValueError`` with advice when the text is not a one-sided model formula
    with a response.
    """
    if not isinstance(formula, str) or "~" not in formula:
        raise ValueError(
            f"the model must be a formula like 'y ~ x + C(g)', got {formula!r}; "
            "write the response on the left of '~'"
        )
    try:
        desc = patsy.ModelDesc.from_formula(formula)
    except patsy.PatsyError as exc:
        raise ValueError(f"could not read the formula {formula!r}: {exc}") from None
    if len(desc.lhs_termlist) != 1 or len(desc.lhs_termlist[0].factors) != 1:
        raise ValueError(
            f"the formula {formula!r} must have exactly one response on the left of '~'"
        )
    response = desc.lhs_termlist[0].factors[0].name()
    intercept = any(len(t.factors) == 0 for t in desc.rhs_termlist)
    terms = [t.name() for t in desc.rhs_termlist if len(t.factors) > 0]
    return response, terms, intercept


def normalise_term(term: str) -> list[str]:
    """patsy's spelling of the term(s) in ``term`` (e.g. ``"x*z"`` gives x, z, x:z)."""
    if not isinstance(term, str) or not term.strip():
        raise ValueError(f"a term must be non-empty formula text, got {term!r}")
    return list(_normalise_term(term))


@functools.lru_cache(maxsize=4096)
def _normalise_term(term: str) -> tuple:
    """patsy's spelling of the term(s) in ``term`` (e.g. ``"x*z"`` gives x, z, x:z)."""
    if not isinstance(term, str) or not term.strip():
        raise ValueError(f"a term must be non-empty formula text, got {term!r}")
    try:
        desc = patsy.ModelDesc.from_formula("__y__ ~ 0 + " + term)
    except patsy.PatsyError as exc:
        raise ValueError(f"could not read the term {term!r}: {exc}") from None
    names = [t.name() for t in desc.rhs_termlist if len(t.factors) > 0]
    if not names:
        raise ValueError(f"the term {term!r} adds no columns")
    return tuple(names)


def term_variables(term: str, columns: Sequence[str]) -> list[str]:
    """Columns of the data that ``term`` refers to (by patsy's own factor parsing)."""
    desc = patsy.ModelDesc.from_formula("__y__ ~ 0 + " + term)
    found: list[str] = []
    cols = set(columns)
    for t in desc.rhs_termlist:
        for f in t.factors:
            for name in _factor_names(f.name()):
                if name in cols and name not in found:
                    found.append(name)
    return found


def _factor_names(code: str) -> list[str]:
    """Names a factor's Python code reads: bare identifiers and the targets of ``Q("...")``."""
    import ast

    try:
        tree = ast.parse(code, mode="eval")
    except SyntaxError:
        return []
    names: list[str] = []
    for node in ast.walk(tree):
        if isinstance(node, ast.Name):
            names.append(node.id)
        elif (
            isinstance(node, ast.Call)
            and isinstance(node.func, ast.Name)
            and node.func.id == "Q"
            and node.args
            and isinstance(node.args[0], ast.Constant)
            and isinstance(node.args[0].value, str)
        ):
            names.append(node.args[0].value)
    return names


@dataclass(frozen=True)
class Declarations:
    """What the analyst states they know before looking at residuals.

    Attributes
    ----------
    time : name of an ordered variable (numeric or datetime) or None.
    period : cycle lengths in the units of ``time`` (datetimes are read as decimal years).
    groups : categorical variables whose levels may have their own slopes.
    plausible : variables the analyst has grounds for, each with a reason ("" when none given).
    """

    time: str | None = None
    period: tuple[float, ...] = ()
    groups: tuple[str, ...] = ()
    plausible: Mapping[str, str] = field(default_factory=dict)

    @classmethod
    def build(cls, columns: Sequence[str], *, time=None, period=None, groups=None, plausible=None):
        """Validate declarations against the data's columns and normalise their types."""
        cols = list(columns)

        def need(name, what):
            if name not in cols:
                raise ValueError(
                    f"{what} names the column {name!r}, which is not in the data; "
                    f"available columns: {', '.join(map(repr, cols[:20]))}"
                )

        if time is not None:
            need(time, "time=")
        if period is None:
            periods: tuple[float, ...] = ()
        elif isinstance(period, (int, float)):
            periods = (float(period),)
        else:
            periods = tuple(float(p) for p in period)
        for p in periods:
            if not p > 0 or p != p or p == float("inf"):
                raise ValueError(f"period= must hold positive cycle lengths, got {period!r}")
        if periods and time is None:
            raise ValueError("period= needs time= as well: say which column orders the rows")
        if groups is None:
            grp: tuple[str, ...] = ()
        elif isinstance(groups, str):
            grp = (groups,)
        else:
            grp = tuple(groups)
        for g in grp:
            need(g, "groups=")
        if plausible is None:
            pl: dict[str, str] = {}
        elif isinstance(plausible, str):
            pl = {plausible: ""}
        elif isinstance(plausible, Mapping):
            pl = {str(k): str(v) for k, v in plausible.items()}
        else:
            pl = {str(k): "" for k in plausible}
        for name in pl:
            need(name, "plausible=")
        return cls(time=time, period=periods, groups=grp, plausible=pl)

    def as_dict(self) -> dict:
        return {
            "time": self.time,
            "period": list(self.period),
            "groups": list(self.groups),
            "plausible": dict(self.plausible),
        }
