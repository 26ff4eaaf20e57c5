"""The pack as a renderer-neutral document: sections of paragraphs, tables and figures.

Both renderers (HTML and PDF) draw the same document, so every number appears with the
same formatting in both. Each number in a table is a :class:`Cell` that remembers where it
came from: the path(s) into ``summary.json``, the transformation applied (``op``) and the
format (``fmt``). The HTML carries them as ``data-src``/``data-op``/``data-fmt`` attributes,
so anyone (and the test suite) can trace a printed number back to the run's summary.

Formatting rules (stated in the pack's method notes)
----------------------------------------------------
``pct1``/``pct2``  percentage with 1 or 2 decimals: ``0.01234 -> "1.23%"``
``pp2``            percentage points with sign:     ``0.0123 -> "+1.23 pp"``
``num1``..``num4``, ``num6`` plain decimals;  ``snum3`` with an explicit sign
``pval``           3 decimals, values below 0.0005 print as ``"<0.001"``
``int``            thousands separated by commas;  ``id`` an integer as is (seeds)
``bp1``            basis points with one decimal:    ``0.00123 -> "12.3 bp"``
A value that rounds to zero never prints a minus sign. Missing values print ``"n/a"``.

Transformations (``op``; ``P`` = periods per year)
-------------------------------------------------
``id`` x; ``ann_mean`` x*P; ``ann_vol`` x*sqrt(P); ``ann_sharpe`` x*sqrt(P);
``ann_vol_from_var`` sqrt(x*P); ``diff`` a-b; ``ann_mean_diff`` (a-b)*P;
``ann_sharpe_diff`` (a-b)*sqrt(P); ``band`` a-b (a 95th minus a 5th percentile);
``max_band`` the largest p95-p5 over the assets of a ``weights`` mapping.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field
from typing import Optional

import pandas as pd

from ._run import RunFolder, as_float, dig

__all__ = ["Cell", "Table", "Figure", "Para", "Section", "fmt_value", "apply_op", "cell",
           "text_cell", "OPS", "FORMATS"]

NA = "n/a"


def _strip_negative_zero(text: str) -> str:
    if text.startswith("-") and not any(ch in "123456789" for ch in text):
        return text[1:]
    return text


def fmt_value(x: Optional[float], fmt: str) -> str:
    """Format a number by the pack's rules (see the module docstring)."""
    if x is None or (isinstance(x, float) and not math.isfinite(x)):
        return NA
    if fmt in ("pct1", "pct2"):
        d = int(fmt[-1])
        return _strip_negative_zero(f"{x * 100:.{d}f}") + "%"
    if fmt == "pp2":
        s = _strip_negative_zero(f"{x * 100:+.2f}")
        if s.startswith("+") and not any(ch in "123456789" for ch in s):
            s = s[1:]
        return s + " pp"
    if fmt in ("num1", "num2", "num3", "num4", "num6"):
        return _strip_negative_zero(f"{x:.{int(fmt[-1])}f}")
    if fmt == "snum3":
        s = _strip_negative_zero(f"{x:+.3f}")
        if s.startswith("+") and not any(ch in "123456789" for ch in s):
            s = s[1:]
        return s
    if fmt == "pval":
        return "<0.001" if x < 0.0005 else f"{x:.3f}"
    if fmt == "int":
        return f"{int(round(x)):,}"
    if fmt == "id":
        return str(int(round(x)))
    if fmt == "bp1":
        return _strip_negative_zero(f"{x * 1e4:.1f}") + " bp"
    raise ValueError(f"unknown format {fmt!r}")


FORMATS = ("pct1", "pct2", "pp2", "num1", "num2", "num3", "num4", "num6", "snum3", "pval", "int", "id", "bp1")


def _max_band(weights) -> Optional[float]:
    if not isinstance(weights, dict) or not weights:
        return None
    widths = []
    for w in weights.values():
        lo, hi = as_float(dig(w, "p5")), as_float(dig(w, "p95"))
        if lo is None or hi is None:
            return None
        widths.append(hi - lo)
    return max(widths)


def apply_op(op: str, values: list, ppy: int) -> Optional[float]:
    """Apply a transformation to the looked-up summary values (None when any is missing)."""
    if op == "max_band":
        return _max_band(values[0])
    xs = [as_float(v) for v in values]
    if any(x is None for x in xs):
        return None
    r = math.sqrt(ppy)
    if op == "id":
        return xs[0]
    if op == "ann_mean":
        return xs[0] * ppy
    if op in ("ann_vol", "ann_sharpe"):
        return xs[0] * r
    if op == "ann_vol_from_var":
        return math.sqrt(xs[0] * ppy) if xs[0] >= 0 else None
    if op in ("diff", "band"):
        return xs[0] - xs[1]
    if op == "ann_mean_diff":
        return (xs[0] - xs[1]) * ppy
    if op == "ann_sharpe_diff":
        return (xs[0] - xs[1]) * r
    raise ValueError(f"unknown op {op!r}")


OPS = ("id", "ann_mean", "ann_vol", "ann_sharpe", "ann_vol_from_var", "diff", "band",
       "ann_mean_diff", "ann_sharpe_diff", "max_band")


@dataclass(frozen=True)
class Cell:
    """One table cell: printed text plus, for numbers, the value and where it came from."""

    text: str
    value: Optional[float] = None
    src: tuple = ()          # tuple of paths (each a tuple of keys) into summary.json
    op: str = "id"
    fmt: str = ""
    status: Optional[str] = None   # "pass" | "fail" | "na" for verdict results
    numeric: bool = False


def cell(run: RunFolder, *paths, op: str = "id", fmt: str = "num3") -> Cell:
    """A traced number cell: look up ``paths`` in the summary, apply ``op``, format."""
    values = [dig(run.summary, *p) for p in paths]
    value = apply_op(op, values, run.periods_per_year)
    return Cell(text=fmt_value(value, fmt), value=value, src=tuple(tuple(p) for p in paths),
                op=op, fmt=fmt, numeric=True)


def text_cell(text, status: Optional[str] = None) -> Cell:
    return Cell(text="" if text is None else str(text), status=status)


@dataclass(frozen=True)
class Table:
    """A table; ``key`` names its CSV in ``pack/data/``."""

    key: str
    caption: str
    columns: tuple
    rows: tuple
    note: str = ""
    first_column_is_label: bool = True

    def column_chunks(self, max_cols: int) -> list:
        """Column index lists for printing a wide table in parts that repeat the label column."""
        n = len(self.columns)
        if n <= max_cols or not self.first_column_is_label:
            return [list(range(n))]
        rest = list(range(1, n))
        per = max_cols - 1
        k = -(-len(rest) // per)            # parts needed
        per = -(-len(rest) // k)            # spread the columns evenly over the parts
        return [[0] + rest[i:i + per] for i in range(0, len(rest), per)]

    def numeric_columns(self) -> list:
        """Whether each column holds numbers (then all its cells align right)."""
        return [any(r[i].numeric for r in self.rows) for i in range(len(self.columns))]

    def frame(self) -> pd.DataFrame:
        """The numbers drawn (unrounded, after the stated transformation)."""
        data = []
        for row in self.rows:
            data.append([c.value if c.numeric else c.text for c in row])
        return pd.DataFrame(data, columns=list(self.columns))


@dataclass(frozen=True)
class Figure:
    """A rendered figure (PNG bytes) and the exact numbers it draws."""

    key: str
    caption: str
    png: bytes
    width_in: float
    height_in: float
    data: pd.DataFrame
    alt: str = ""


@dataclass(frozen=True)
class Para:
    """A paragraph. ``style``: body, lead, answer-pass, answer-fail, answer-open, absent, note."""

    text: str
    style: str = "body"


@dataclass(frozen=True)
class Section:
    number: int
    key: str
    title: str
    blocks: tuple = field(default_factory=tuple)
    hypothetical: bool = False
    absent: Optional[str] = None   # why the section's results are absent, when they are
