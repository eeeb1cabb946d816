"""Row filters for layers read through pyarrow: a SQL ``WHERE`` text to an Arrow expression.

OGR evaluates ``--where`` for the formats it opens. GeoParquet, Arrow streams and layers held in
memory (a chain's intermediate results) are filtered here instead: the text is parsed into a
``pyarrow.compute.Expression``, which a ``pyarrow.dataset`` pushes down to skip row groups and
which filters an in-memory table the same way. The accepted language is the common core of SQL
``WHERE`` clauses (the one OGR and SQLite share): comparisons, ``AND``/``OR``/``NOT``,
``[NOT] IN (...)``, ``[NOT] BETWEEN .. AND ..``, ``[NOT] LIKE`` (case-insensitive, as in OGR),
``IS [NOT] NULL``, parentheses, ``'text'`` literals and ``"quoted"`` field names. A row whose
condition is NULL is dropped, as SQL does.
"""

from __future__ import annotations

import re
from collections.abc import Sequence

import numpy as np
import pandas as pd
import pyarrow as pa
import pyarrow.compute as pc

from ..errors import ParameterError, spell

__all__ = ["parse_where", "filter_table", "filter_frame"]

_TOKEN = re.compile(
    r"""\s*(?:
    (?P<number>(?:\d+\.?\d*|\.\d+)(?:[eE][+-]?\d+)?)
  | (?P<string>'(?:[^']|'')*')
  | (?P<quoted>"(?:[^"]|"")*")
  | (?P<word>[A-Za-z_][A-Za-z0-9_]*)
  | (?P<op><>|!=|<=|>=|==|=|<|>|\(|\)|,|-)
  )""",
    re.VERBOSE,
)
_COMPARE = {
    "=": pc.equal,
    "==": pc.equal,
    "!=": pc.not_equal,
    "<>": pc.not_equal,
    "<": pc.less,
    "<=": pc.less_equal,
    ">": pc.greater,
    ">=": pc.greater_equal,
}
_KEYWORDS = {"AND", "OR", "NOT", "IN", "IS", "NULL", "LIKE", "BETWEEN", "TRUE", "FALSE"}


class _Field(str):
    """A field name met in the text (kept apart from text literals)."""


def _tokens(text: str) -> list[tuple[str, str]]:
    out, pos = [], 0
    while pos < len(text):
        if text[pos:].strip() == "":
            break
        match = _TOKEN.match(text, pos)
        if match is None or match.end() == pos:
            raise _error(text, f"cannot read it from {text[pos:].strip()[:20]!r} on")
        kind = match.lastgroup
        value = match.group(kind)
        if kind == "word" and value.upper() in _KEYWORDS:
            kind, value = "keyword", value.upper()
        out.append((kind, value))
        pos = match.end()
    return out


def _error(text: str, why: str) -> ParameterError:
    return ParameterError(
        f"The {spell('where')} filter {text!r} {why}. Allowed: comparisons (= <> < <= > >=), AND, OR, NOT, "
        "IN (...), BETWEEN .. AND .., LIKE '..%', IS [NOT] NULL, 'text' and \"field names\"."
    )


class _Parser:
    def __init__(self, text: str):
        self.text = text
        self.tokens = _tokens(text)
        self.pos = 0
        self.fields: list[str] = []

    def peek(self, *values: str) -> bool:
        if self.pos >= len(self.tokens):
            return False
        return not values or self.tokens[self.pos][1] in values

    def take(self, *values: str) -> tuple[str, str]:
        if not self.peek(*values):
            found = repr(self.tokens[self.pos][1]) if self.pos < len(self.tokens) else "the end"
            raise _error(self.text, f"expects {' or '.join(values) or 'a value'} before {found}")
        token = self.tokens[self.pos]
        self.pos += 1
        return token

    def parse(self) -> pc.Expression:
        if not self.tokens:
            raise _error(self.text, "is empty")
        expression = self.disjunction()
        if self.pos != len(self.tokens):
            raise _error(self.text, f"has something left over at {self.tokens[self.pos][1]!r}")
        return expression

    def disjunction(self):
        left = self.conjunction()
        while self.peek("OR"):
            self.take("OR")
            left = left | self.conjunction()
        return left

    def conjunction(self):
        left = self.negation()
        while self.peek("AND"):
            self.take("AND")
            left = left & self.negation()
        return left

    def negation(self):
        if self.peek("NOT"):
            self.take("NOT")
            return ~self.negation()
        return self.predicate()

    def predicate(self):
        if self.peek("("):
            # a parenthesised condition, unless it turns out to be a value: "(pop) > 3" is rare,
            # so parentheses always group conditions here
            self.take("(")
            inner = self.disjunction()
            self.take(")")
            return inner
        left = self.operand()
        negate = False
        if self.peek("NOT"):
            self.take("NOT")
            negate = True
            if not self.peek("IN", "LIKE", "BETWEEN"):
                raise _error(self.text, "has NOT where IN, LIKE or BETWEEN was expected")
        if self.peek("IS"):
            self.take("IS")
            is_not = self.peek("NOT") and self.take("NOT") is not None
            self.take("NULL")
            test = _expression(left).is_null()
            return ~test if is_not else test
        if self.peek("IN"):
            self.take("IN")
            self.take("(")
            values = [self.literal()]
            while self.peek(","):
                self.take(",")
                values.append(self.literal())
            self.take(")")
            test = _expression(left).isin(values)
            # SQL: a NULL value is neither IN nor NOT IN a list; isin would call it False
            test = pc.if_else(_expression(left).is_null(), pa.scalar(None, pa.bool_()), test)
        elif self.peek("BETWEEN"):
            self.take("BETWEEN")
            low = self.operand()
            self.take("AND")
            high = self.operand()
            test = (_expression(left) >= _expression(low)) & (_expression(left) <= _expression(high))
        elif self.peek("LIKE"):
            self.take("LIKE")
            kind, pattern = self.take()
            if kind != "string":
                raise _error(self.text, "needs a 'quoted' pattern after LIKE")
            test = pc.match_like(_expression(left), _unquote(pattern), ignore_case=True)
        elif self.peek(*_COMPARE):
            _, op = self.take()
            test = _COMPARE[op](_expression(left), _expression(self.operand()))
        else:
            raise _error(self.text, f"needs a comparison after {self.tokens[self.pos - 1][1]!r}")
        return ~test if negate else test

    def operand(self):
        if self.peek() and self.tokens[self.pos][0] in ("word", "quoted"):
            kind, value = self.take()
            name = _Field(value if kind == "word" else value[1:-1].replace('""', '"'))
            self.fields.append(name)
            return name
        return self.literal()

    def literal(self):
        negative = self.peek("-") and self.take("-") is not None
        if self.pos >= len(self.tokens):
            raise _error(self.text, "ends where a value was expected")
        kind, value = self.take()
        if kind == "number":
            number = float(value) if any(c in value for c in ".eE") else int(value)
            return -number if negative else number
        if negative:
            raise _error(self.text, f"has '-' before {value!r}")
        if kind == "string":
            return _unquote(value)
        if kind == "keyword" and value in ("TRUE", "FALSE"):
            return value == "TRUE"
        if kind == "keyword" and value == "NULL":
            return None
        raise _error(self.text, f"has {value!r} where a value was expected")


def _unquote(token: str) -> str:
    return token[1:-1].replace("''", "'")


def _expression(value) -> pc.Expression:
    if isinstance(value, _Field):
        return pc.field(str(value))
    return pc.scalar(value)


def parse_where(text: str, fields: Sequence[str] | None = None) -> pc.Expression:
    """Parse a SQL ``WHERE`` condition into a ``pyarrow.compute.Expression``.

    Parameters
    ----------
    text : str
        The condition, e.g. ``"tenure = 'rented' AND pop >= 2"``.
    fields : sequence of str, optional
        Field names of the layer; a name not among them is refused with close suggestions.

    Returns
    -------
    pyarrow.compute.Expression

    Examples
    --------
    >>> import pyarrow as pa
    >>> table = pa.table({"zone": ["harbour", "upland", None], "pop": [3, 0, 5]})
    >>> table.filter(parse_where("zone LIKE 'H%' OR pop > 4"))["pop"].to_pylist()
    [3, 5]
    >>> table.filter(parse_where("zone NOT IN ('upland')"))["zone"].to_pylist()
    ['harbour']
    """
    parser = _Parser(text)
    expression = parser.parse()
    if fields is not None:
        from .read import _suggest

        for name in parser.fields:
            if name not in fields:
                raise ParameterError(
                    f"The {spell('where')} filter {text!r} names field {str(name)!r}, which the layer does "
                    f"not have; {_suggest(name, list(fields))}"
                )
    return expression


def filter_table(table: pa.Table, where: str, label: str) -> pa.Table:
    """The rows of ``table`` that meet ``where``; type mismatches give one clear error."""
    expression = parse_where(where, table.column_names)
    try:
        return table.filter(expression)
    except (pa.ArrowInvalid, pa.ArrowNotImplementedError, pa.ArrowTypeError) as exc:
        raise ParameterError(
            f"The {spell('where')} filter {where!r} cannot be applied to {label}: {str(exc).splitlines()[0]} "
            "(compare text fields with 'quoted' text and numeric fields with numbers)."
        ) from exc


def filter_frame(frame: pd.DataFrame, where: str, label: str) -> pd.DataFrame:
    """The rows of a (Geo)DataFrame that meet ``where``, as a new frame (the input is untouched).

    Examples
    --------
    >>> import pandas as pd
    >>> table = pd.DataFrame({"district": ["Ostravel", "Lintmere"], "mean_dist": [2100.0, 3400.5]})
    >>> filter_frame(table, "mean_dist > 3000", "the table")["district"].tolist()
    ['Lintmere']
    """
    geometry = getattr(frame, "_geometry_column_name", None)
    attributes = pd.DataFrame(frame.drop(columns=[geometry]) if geometry in frame.columns else frame)
    try:
        table = pa.Table.from_pandas(attributes.reset_index(drop=True), preserve_index=False)
    except (pa.ArrowInvalid, pa.ArrowTypeError) as exc:
        raise ParameterError(
            f"The {spell('where')} filter cannot read the fields of {label}: {str(exc).splitlines()[0]}."
        ) from exc
    rows = pa.array(np.arange(len(frame), dtype=np.int64))
    kept = filter_table(table.append_column("__row__", rows), where, label).column("__row__")
    return frame.iloc[kept.to_numpy()]
