"""Data intake: read a history file, validate it once, and describe it.

A history file is wide: one date column and one column per asset, holding either
prices (levels) or decimal simple returns per period. CSV (UTF-8, comma, semicolon
or tab separated) and Parquet are read. Every problem the user can fix raises
:class:`~estimators.core.DataError` with one line naming the file, the column and
the row: rows are *data rows*, counted from 1 after the header line, and the date
is given beside the row number whenever the date itself could be read.

Public functions
----------------
load_history
    Read and validate a file into a :class:`~estimators.core.History`.
inspect_history
    The same, plus the intake details (missing cells, what was inferred), summarised.
describe_history
    Summary statistics of a loaded history (annualised mean and volatility, correlation range).
require_rows
    Stop with a clear message when a history is too short for an estimator.
load_assumptions
    Capital-market assumptions instead of a history (re-exported from
    :mod:`noiseproof.assumptions`).
"""
from __future__ import annotations

import csv
import hashlib
import io
import math
from dataclasses import asdict, dataclass, field
from pathlib import Path
from typing import Optional

import numpy as np
import pandas as pd

from estimators.core import PERIODS_PER_YEAR, DataError, History, SettingsError

from .assumptions import Assumptions, load_assumptions, looks_like_assumptions  # noqa: F401

__all__ = [
    "load_history",
    "inspect_history",
    "describe_history",
    "require_rows",
    "load_assumptions",
    "looks_like_assumptions",
    "Assumptions",
    "HistorySummary",
    "AssetSummary",
    "infer_frequency",
    "KINDS",
    "MISSING_POLICIES",
]

KINDS = ("prices", "returns")
MISSING_POLICIES = ("raise", "drop-rows")

#: Cell texts read as "missing" (compared case-insensitively, after stripping blanks).
MISSING_TOKENS = frozenset({"", "na", "n/a", "nan", "null", "none", "#n/a"})

#: Column names taken as the date column when ``date_column`` is not given (case-insensitive).
DATE_NAMES = ("date", "dates", "time", "period", "month", "timestamp", "datetime", "as_of")

#: Date formats tried, in this order; the first that reads every date wins.
#: Day-first and month-first slashed dates are both tried; when both read every date
#: the file is ambiguous and the user is asked to write ISO dates.
DATE_FORMATS = (
    ("%Y-%m-%d", "2001-03-31"),
    ("%Y-%m-%d %H:%M:%S", "2001-03-31 00:00:00"),
    ("%Y-%m-%dT%H:%M:%S", "2001-03-31T00:00:00"),
    ("%Y/%m/%d", "2001/03/31"),
    ("%Y%m%d", "20010331"),
    ("%d/%m/%Y", "31/03/2001"),
    ("%m/%d/%Y", "03/31/2001"),
    ("%d.%m.%Y", "31.03.2001"),
    ("%d-%m-%Y", "31-03-2001"),
    ("%d-%b-%Y", "31-Mar-2001"),
    ("%d %b %Y", "31 Mar 2001"),
    ("%Y-%m", "2001-03 (read as the month's last day)"),
    ("%Y", "2001 (read as the year's last day)"),
)

#: Median spacing of dates (days) -> frequency; the ranges are generous (common practice).
FREQUENCY_SPACING = (
    ("daily", 0.5, 4.5),
    ("weekly", 4.5, 10.5),
    ("monthly", 24.0, 36.0),
    ("quarterly", 80.0, 100.0),
    ("annual", 350.0, 380.0),
)

#: A spacing longer than this (days) counts as a gap worth a note.
GAP_DAYS = {"daily": 5, "weekly": 10, "monthly": 45, "quarterly": 135, "annual": 550}

_PARQUET_SUFFIXES = (".parquet", ".pq", ".parq")


# --------------------------------------------------------------------------- results

@dataclass(frozen=True)
class AssetSummary:
    """Per-asset statistics of a history.

    ``mean`` and ``volatility`` are per period (volatility with divisor T-1);
    the ``_annualised`` fields use mean x P and volatility x sqrt(P), P periods a
    year (common practice; it ignores compounding and autocorrelation).
    """

    name: str
    mean: float
    volatility: float
    mean_annualised: float
    volatility_annualised: float
    minimum: float
    maximum: float
    autocorrelation: Optional[float]
    missing_cells: int


@dataclass(frozen=True)
class HistorySummary:
    """What ``noiseproof inspect`` prints: a loaded history described."""

    source: str
    sha256: str
    kind: str
    kind_inferred: bool
    frequency: str
    frequency_inferred: bool
    periods_per_year: int
    rows: int
    file_rows: int
    first_date: str
    last_date: str
    assets: tuple
    missing_cells: int
    missing_policy: str
    dropped_rows: int
    risk_free: str
    excess: bool
    correlation_min: Optional[float]
    correlation_min_pair: Optional[tuple]
    correlation_max: Optional[float]
    correlation_max_pair: Optional[tuple]
    notes: tuple = field(default_factory=tuple)

    def to_dict(self) -> dict:
        """A JSON-ready dictionary (what ``inspect --json`` prints)."""
        d = asdict(self)
        d["type"] = "history"
        d["annualisation"] = ("mean x periods_per_year, volatility x sqrt(periods_per_year); "
                              "volatility uses divisor T-1")
        d["assets"] = [asdict(a) for a in self.assets]
        for key in ("correlation_min_pair", "correlation_max_pair"):
            if d[key] is not None:
                d[key] = list(d[key])
        d["notes"] = list(self.notes)
        return d

    def to_text(self) -> str:
        """A plain-text report for a terminal."""
        kind = f"{self.kind} ({'detected' if self.kind_inferred else 'as declared'})"
        freq = (f"{self.frequency} ({'inferred from the dates' if self.frequency_inferred else 'as declared'}, "
                f"{self.periods_per_year} periods a year)")
        rows = f"{self.rows} return periods"
        if self.kind == "prices":
            rows += f" (from {self.file_rows - self.dropped_rows} price rows)"
        lines = [
            f"file        {self.source}",
            f"sha256      {self.sha256}",
            f"kind        {kind}",
            f"frequency   {freq}",
            f"rows        {rows}; {self.file_rows} data rows in the file",
            f"dates       {self.first_date} to {self.last_date}",
            f"assets      {len(self.assets)}",
            f"missing     {_plural(self.missing_cells, 'missing cell')}; policy '{self.missing_policy}'; "
            f"{_plural(self.dropped_rows, 'row')} dropped",
            f"risk-free   {self.risk_free}"
            + ("; returns below are in excess of it" if self.excess else ""),
        ]
        if self.correlation_min is not None:
            lo, hi = self.correlation_min_pair, self.correlation_max_pair
            lines.append(
                f"correlation {self.correlation_min:+.2f} ({lo[0]} / {lo[1]}) to "
                f"{self.correlation_max:+.2f} ({hi[0]} / {hi[1]})"
            )
        else:
            lines.append("correlation (one asset only)")
        lines.append("")
        lines.append("annualised: mean x %d, volatility x sqrt(%d) (common practice); "
                     "volatility with divisor T-1" % (self.periods_per_year, self.periods_per_year))
        width = max([len("asset")] + [len(a.name) for a in self.assets])
        lines.append(f"{'asset':<{width}}  {'mean':>8}  {'vol':>8}  {'min':>8}  {'max':>8}  "
                     f"{'ac(1)':>6}  {'missing':>7}")
        for a in self.assets:
            ac = "" if a.autocorrelation is None else f"{a.autocorrelation:+.2f}"
            lines.append(
                f"{a.name:<{width}}  {a.mean_annualised:>8.2%}  {a.volatility_annualised:>8.2%}  "
                f"{a.minimum:>8.2%}  {a.maximum:>8.2%}  {ac:>6}  {a.missing_cells:>7d}"
            )
        lines.append("(min and max are single-period returns; ac(1) is the lag-1 autocorrelation)")
        for note in self.notes:
            lines.append(f"note: {note}")
        return "\n".join(lines)


def _plural(n: int, word: str) -> str:
    return f"{n} {word}{'' if n == 1 else 's'}"


@dataclass(frozen=True)
class _Details:
    """Intake facts that do not belong in History but that ``inspect`` reports."""

    file_rows: int
    missing_by_asset: dict
    kind_inferred: bool
    frequency_inferred: bool
    missing_policy: str
    risk_free: str


# --------------------------------------------------------------------------- helpers

class _Table:
    """A file read column by column.

    ``text`` holds columns read as stripped strings (object arrays), ``numeric``
    columns that arrived already as float64 (Parquet, or the CSV fast path) and
    ``datetimes`` columns that arrived as datetimes. :meth:`cells` gives any column
    as text, for messages.
    """

    def __init__(self, src, header, n_rows, sha256, text=None, numeric=None, datetimes=None):
        self.src = src
        self.header = header
        self.n_rows = int(n_rows)
        self.sha256 = sha256
        self.text = text or {}
        self.numeric = numeric or {}
        self.datetimes = datetimes or {}

    def cells(self, j: int) -> np.ndarray:
        """Column ``j`` as an object array of strings ("" where empty)."""
        if j not in self.text:
            if j in self.datetimes:
                vals = pd.DatetimeIndex(self.datetimes[j])
                self.text[j] = np.array(["" if pd.isna(v) else _fmt_date(v) for v in vals], dtype=object)
            else:
                vals = self.numeric[j]
                self.text[j] = np.array(["" if np.isnan(v) else repr(float(v)) for v in vals], dtype=object)
        return self.text[j]


def _read_bytes(path: Path, what: str = "file") -> bytes:
    if not path.exists():
        raise DataError(f"{path}: {what} not found")
    if path.is_dir():
        raise DataError(f"{path}: is a folder, not a {what}")
    try:
        return path.read_bytes()
    except OSError as exc:
        raise DataError(f"{path}: cannot read the {what} ({exc.strerror or exc.__class__.__name__})") from None


def _read_table(path, what: str = "file", date_column: Optional[str] = None) -> _Table:
    path = Path(path)
    data = _read_bytes(path, what)
    sha = hashlib.sha256(data).hexdigest()
    src = str(path)
    if not data.strip():
        raise DataError(f"{src}: the {what} is empty")
    if path.suffix.lower() in _PARQUET_SUFFIXES or data[:4] == b"PAR1":
        return _read_parquet(path, data, sha)
    return _read_csv(src, data, sha, date_column)


def _read_csv(src: str, data: bytes, sha: str, date_column: Optional[str] = None) -> _Table:
    try:
        text = data.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        raise DataError(f"{src}: cannot read the file as UTF-8 text (bad byte at offset {exc.start}); "
                        f"save it as a UTF-8 CSV or as Parquet") from None
    if "\x00" in text:
        raise DataError(f"{src}: the file holds binary data, not CSV text")
    head = text.lstrip()
    first = head[: head.find("\n")] if "\n" in head else head
    delimiter = ","
    if "," not in first:
        if ";" in first:
            delimiter = ";"
        elif "\t" in first:
            delimiter = "\t"
    fast = _read_csv_fast(src, text, sha, delimiter, date_column)
    return fast if fast is not None else _read_csv_exact(src, text, sha, delimiter)


def _read_csv_fast(src, text, sha, delimiter, date_column) -> Optional[_Table]:
    """pandas' C parser when every cell but the dates is a finite number; else None.

    Anything unusual (ragged or blank rows, missing or non-numeric cells, duplicate
    names, leading blank lines) returns None and the exact reader takes over, so the
    messages are the same either way.
    """
    if not text[:1].strip():
        return None
    header = [c.strip() for c in next(csv.reader([text.split("\n", 1)[0].rstrip("\r")],
                                                 delimiter=delimiter))]
    if len(header) < 2 or len(set(header)) != len(header) or "" in header:
        return None
    lowered = [h.lower() for h in header]
    if date_column is not None:
        if date_column not in header:
            return None
        jd = header.index(date_column)
    else:
        jd = next((lowered.index(n) for n in DATE_NAMES if n in lowered), 0)
    try:
        frame = pd.read_csv(io.StringIO(text), sep=delimiter, header=None, skiprows=1,
                            names=list(range(len(header))), index_col=False,
                            dtype={j: (object if j == jd else np.float64) for j in range(len(header))},
                            keep_default_na=False, na_values=[""], skip_blank_lines=False,
                            engine="c")
    except (ValueError, pd.errors.ParserError, OverflowError):
        return None
    if frame.shape[0] == 0 or frame.shape[1] != len(header):
        return None
    block = frame.drop(columns=[jd]).to_numpy(dtype=np.float64)
    if not np.isfinite(block).all():
        return None
    dates = frame[jd]
    if dates.isna().any():
        return None
    numeric = {j: frame[j].to_numpy(dtype=np.float64) for j in range(len(header)) if j != jd}
    text_cols = {jd: np.array([str(v).strip() for v in dates], dtype=object)}
    return _Table(src, header, frame.shape[0], sha, text=text_cols, numeric=numeric)


def _read_csv_exact(src: str, text: str, sha: str, delimiter: str) -> _Table:
    reader = csv.reader(io.StringIO(text, newline=""), delimiter=delimiter)
    header = None
    rows = []
    try:
        for row in reader:
            if not row or not any(c.strip() for c in row):
                continue
            if header is None:
                header = [c.strip() for c in row]
                continue
            if len(row) != len(header):
                raise DataError(
                    f"{src}: line {reader.line_num} (data row {len(rows) + 1}) has {len(row)} fields "
                    f"but the header has {len(header)}"
                )
            rows.append([c.strip() for c in row])
    except csv.Error as exc:
        raise DataError(f"{src}: line {reader.line_num}: not valid CSV ({exc})") from None
    if header is None:
        raise DataError(f"{src}: the file is empty")
    if not rows:
        raise DataError(f"{src}: the file has a header line but no data rows")
    cells = np.array(rows, dtype=object).reshape(len(rows), len(header))
    return _Table(src, header, len(rows), sha, text={j: cells[:, j] for j in range(len(header))})


def _read_parquet(path: Path, data: bytes, sha: str) -> _Table:
    src = str(path)
    try:
        frame = pd.read_parquet(io.BytesIO(data))
    except Exception as exc:  # pyarrow raises many types for a bad file
        raise DataError(f"{src}: cannot read the file as Parquet ({exc.__class__.__name__})") from None
    if not isinstance(frame.index, pd.RangeIndex) or frame.index.name is not None:
        frame = frame.reset_index()
    header = [str(c).strip() for c in frame.columns]
    if frame.shape[0] == 0:
        raise DataError(f"{src}: the file has columns but no data rows")
    numeric, datetimes, text = {}, {}, {}
    for j in range(frame.shape[1]):
        col = frame.iloc[:, j]
        if pd.api.types.is_datetime64_any_dtype(col.dtype):
            values = pd.DatetimeIndex(col)
            if values.tz is not None:
                values = values.tz_localize(None)
            datetimes[j] = values.to_numpy(dtype="datetime64[ns]")
        elif pd.api.types.is_numeric_dtype(col.dtype) and not pd.api.types.is_bool_dtype(col.dtype):
            numeric[j] = col.to_numpy(dtype=float, na_value=np.nan)
        else:
            text[j] = np.array(["" if (v is None or (isinstance(v, float) and math.isnan(v))) else str(v).strip()
                                for v in col.tolist()], dtype=object)
    return _Table(src, header, frame.shape[0], sha, text=text, numeric=numeric, datetimes=datetimes)


def _row(i: int, dates=None) -> str:
    """'data row 5 (date 2001-03-31)' for the 0-based row index ``i``."""
    if dates is not None and not pd.isna(dates[i]):
        return f"data row {i + 1} (date {_fmt_date(dates[i])})"
    return f"data row {i + 1}"


def _fmt_date(d) -> str:
    ts = pd.Timestamp(d)
    if ts == ts.normalize():
        return ts.strftime("%Y-%m-%d")
    return ts.isoformat()


def _find_date_column(table: _Table, date_column: Optional[str]) -> int:
    header = table.header
    if date_column is not None:
        if date_column in header:
            return header.index(date_column)
        raise DataError(f"{table.src}: no column named '{date_column}' (columns: {', '.join(header)})")
    lowered = [h.lower() for h in header]
    for name in DATE_NAMES:
        if name in lowered:
            return lowered.index(name)
    if table.datetimes:
        return min(table.datetimes)
    # an unnamed first column (a saved index) or a first column that reads as dates
    first = table.cells(0)
    if header[0] == "" or header[0].lower().startswith("unnamed"):
        return 0
    if _best_date_format(first)[1] == len(first):
        return 0
    raise DataError(
        f"{table.src}: no date column found (looked for a column named "
        f"{', '.join(repr(n) for n in DATE_NAMES[:3])}..., or a first column of dates; "
        f"the first column is '{header[0]}'); name it 'date' or pass --date-column"
    )


def _parse_with(values: np.ndarray, fmt: str) -> pd.DatetimeIndex:
    parsed = pd.to_datetime(pd.Series(values, dtype=object), format=fmt, errors="coerce")
    idx = pd.DatetimeIndex(parsed)
    if fmt == "%Y-%m":
        idx = idx + pd.offsets.MonthEnd(0)
    elif fmt == "%Y":
        idx = idx + pd.offsets.YearEnd(0)
    return idx


def _best_date_format(values: np.ndarray):
    """(format, count parsed, parsed index) of the format that reads the most values."""
    best = (None, -1, None)
    for fmt, _ in DATE_FORMATS:
        idx = _parse_with(values, fmt)
        n = int(idx.notna().sum())
        if n > best[1]:
            best = (fmt, n, idx)
        if n == len(values):
            break
    return best


def _parse_dates(table: _Table, j: int, what: str = "") -> np.ndarray:
    """Parse column ``j`` as dates; return datetime64[ns] (R,). Errors name the row."""
    src, name = table.src, table.header[j] or f"column {j + 1}"
    if j in table.datetimes:
        nat = np.flatnonzero(np.isnat(table.datetimes[j]))
        if nat.size:
            raise DataError(f"{src}: column '{name}', {_row(int(nat[0]))}: the date is missing")
        return table.datetimes[j]
    values = table.cells(j)
    empty = np.flatnonzero(values == "")
    if empty.size:
        raise DataError(f"{src}: column '{name}', {_row(int(empty[0]))}: the date is missing")
    fmt, n, idx = _best_date_format(values)
    if n < len(values):
        bad = int(np.flatnonzero(idx.isna())[0]) if n > 0 else 0
        examples = ", ".join(e for _, e in DATE_FORMATS[:1] + DATE_FORMATS[5:7])
        raise DataError(f"{src}: column '{name}', {_row(bad)}: cannot read '{values[bad]}' as a date "
                        f"(write dates like {examples})")
    if fmt == "%d/%m/%Y":
        other = _parse_with(values, "%m/%d/%Y")
        if other.notna().all() and not (other == idx).all():
            raise DataError(f"{src}: column '{name}': the dates read both as day/month/year and as "
                            f"month/day/year; write them as YYYY-MM-DD")
    return idx.to_numpy(dtype="datetime64[ns]")


def _check_date_order(src: str, name: str, dates: np.ndarray) -> None:
    if len(dates) < 2:
        return
    d = np.diff(dates.astype("int64"))
    same = np.flatnonzero(d == 0)
    if same.size:
        i = int(same[0])
        raise DataError(f"{src}: column '{name}': date {_fmt_date(dates[i])} appears twice "
                        f"(data rows {i + 1} and {i + 2})")
    back = np.flatnonzero(d < 0)
    if back.size:
        if back.size == d.size:
            raise DataError(f"{src}: column '{name}': the dates run newest first (data row 1 is "
                            f"{_fmt_date(dates[0])}, data row 2 is {_fmt_date(dates[1])}); "
                            f"sort the file oldest first")
        i = int(back[0])
        raise DataError(f"{src}: column '{name}': dates are not in increasing order: data row {i + 2} "
                        f"({_fmt_date(dates[i + 1])}) comes after data row {i + 1} "
                        f"({_fmt_date(dates[i])})")


def _to_numbers(table: _Table, j: int, dates: np.ndarray):
    """Column ``j`` as float64 (R,) with NaN where missing, and the missing mask.

    Non-numeric and non-finite cells raise DataError naming column and row.
    """
    src, name = table.src, table.header[j]
    if j in table.numeric:
        values = np.array(table.numeric[j], dtype=float)
        missing = np.isnan(values)
    else:
        cells = table.cells(j)
        text = pd.Series(cells, dtype=object)
        values = np.array(pd.to_numeric(text, errors="coerce"), dtype=float)
        missing = np.zeros(values.shape, dtype=bool)
        nan = np.flatnonzero(np.isnan(values))
        if nan.size:
            missing[nan] = text.iloc[nan].str.lower().isin(MISSING_TOKENS).to_numpy()
            values[nan] = np.nan
        bad = np.flatnonzero(np.isnan(values) & ~missing)
        if bad.size:
            i = int(bad[0])
            cell = cells[i]
            hint = ""
            if cell.endswith("%"):
                hint = " (write percentages as decimals, e.g. 0.012 for 1.2%)"
            elif "," in cell:
                hint = " (use '.' as the decimal mark and no thousands separator)"
            raise DataError(f"{src}: column '{name}', {_row(i, dates)}: non-numeric value '{cell}'{hint}")
    inf = np.flatnonzero(np.isinf(values))
    if inf.size:
        i = int(inf[0])
        raise DataError(f"{src}: column '{name}', {_row(i, dates)}: value '{table.cells(j)[i]}' is not "
                        f"a finite number")
    return values, missing


def infer_frequency(dates: np.ndarray, src: str = "") -> str:
    """The frequency whose usual spacing contains the median spacing of ``dates``.

    Parameters
    ----------
    dates : ndarray, shape (T,), datetime64
        Strictly increasing dates, T >= 2.
    src : str
        Name used in the error message.

    Returns
    -------
    str
        One of ``daily``, ``weekly``, ``monthly``, ``quarterly``, ``annual``.
    """
    days = np.diff(np.asarray(dates, dtype="datetime64[ns]")).astype("timedelta64[s]").astype(float) / 86400.0
    if days.size == 0:
        raise DataError(f"{src}: one date only; cannot infer the frequency (pass --frequency)")
    med = float(np.median(days))
    for name, lo, hi in FREQUENCY_SPACING:
        if lo <= med < hi:
            return name
    raise DataError(f"{src}: cannot infer the frequency: the median spacing between dates is "
                    f"{med:g} days, which is not daily, weekly, monthly, quarterly or annual; "
                    f"pass --frequency")


def _gap_note(dates: np.ndarray, frequency: str) -> Optional[str]:
    days = np.diff(dates).astype("timedelta64[s]").astype(float) / 86400.0
    long = np.flatnonzero(days > GAP_DAYS[frequency])
    if not long.size:
        return None
    k = int(long[np.argmax(days[long])])
    return (f"{long.size} gap{'s' if long.size > 1 else ''} longer than usual for {frequency} data "
            f"(largest: {days[k]:.0f} days after {_fmt_date(dates[k])}); a return across a gap "
            f"spans more than one period")


def _validate_options(kind, frequency, missing, risk_free, risk_free_column, risk_free_path):
    if kind is not None and kind not in KINDS:
        raise SettingsError(f"kind must be one of {', '.join(KINDS)}, not {kind!r}")
    if frequency is not None and frequency not in PERIODS_PER_YEAR:
        raise SettingsError(f"frequency must be one of {', '.join(PERIODS_PER_YEAR)}, not {frequency!r}")
    if missing not in MISSING_POLICIES:
        raise SettingsError(f"missing must be one of {', '.join(MISSING_POLICIES)}, not {missing!r}")
    given = [n for n, v in (("risk_free", risk_free), ("risk_free_column", risk_free_column),
                            ("risk_free_path", risk_free_path)) if v is not None]
    if len(given) > 1:
        raise SettingsError(f"give at most one risk-free source (got {', '.join(given)})")
    if risk_free is not None:
        if isinstance(risk_free, bool) or not isinstance(risk_free, (int, float, np.floating)) \
                or not math.isfinite(risk_free) or not -1.0 < risk_free < 1.0:
            raise SettingsError(f"the risk-free rate must be a decimal rate per period between -1 and 1 "
                                f"(e.g. 0.002 for 0.2% a month), not {risk_free!r}")


def _infer_kind(src: str, values: np.ndarray) -> str:
    if not values.size:
        raise DataError(f"{src}: no values to read")
    lo, hi = float(values.min()), float(values.max())
    if lo <= 0.0:
        return "returns"
    if lo >= 1.0:
        return "prices"
    raise DataError(f"{src}: cannot tell whether the file holds prices or returns (every value is "
                    f"positive, from {lo:.6g} to {hi:.6g}); pass --kind prices or --kind returns")


def _check_returns(src, assets, values, dates, rows, declared: bool):
    """Scale checks (prices or percentages given as returns) and the -100% floor."""
    if not values.size:
        return
    lowest = values.min(axis=0)
    typical = np.median(np.abs(values), axis=0)
    for k, name in enumerate(assets):
        if declared and lowest[k] >= 1.0:
            raise DataError(f"{src}: column '{name}': every value is 1 or more (at least +100% a "
                            f"period; smallest {lowest[k]:.6g}): these look like prices, not returns; "
                            f"pass --kind prices")
        if typical[k] >= 0.5:
            raise DataError(f"{src}: column '{name}': the typical return is {typical[k]:.4g} per period "
                            f"({typical[k]:.0%}); returns must be decimals (0.012 for 1.2%); if these "
                            f"are percentages divide by 100, if they are prices pass --kind prices")
    for k, name in enumerate(assets):
        if lowest[k] <= -1.0:
            col = values[:, k]
            i = int(np.flatnonzero(col <= -1.0)[0])
            raise DataError(f"{src}: column '{name}', {_row(rows[i], dates)}: return {col[i]:.6g} is at "
                            f"or below -100%; returns must be decimals above -1")


def _check_prices(src, assets, values, dates, rows):
    for k, name in enumerate(assets):
        col = values[:, k]
        bad = np.flatnonzero(col <= 0.0)
        if bad.size:
            i = int(bad[0])
            hint = ""
            if (col < 0).any() and np.abs(col).max() < 1.0:
                hint = "; the column looks like returns: pass --kind returns"
            raise DataError(f"{src}: column '{name}', {_row(rows[i], dates)}: price {col[i]:.6g} is not "
                            f"positive{hint}")


def _read_risk_free_file(path, dates_needed: np.ndarray, data_src: str, row_numbers: np.ndarray,
                         data_dates: np.ndarray) -> tuple:
    table = _read_table(path, "risk-free file")
    src = table.src
    jd = _find_date_column(table, None)
    others = [j for j in range(len(table.header)) if j != jd]
    if len(others) != 1:
        raise DataError(f"{src}: a risk-free file needs a date column and exactly one rate column "
                        f"(found {len(others)} other columns: {', '.join(table.header[j] for j in others)})")
    rdates = _parse_dates(table, jd)
    _check_date_order(src, table.header[jd], rdates)
    rates, missing = _to_numbers(table, others[0], rdates)
    if missing.any():
        i = int(np.flatnonzero(missing)[0])
        raise DataError(f"{src}: column '{table.header[others[0]]}', {_row(i, rdates)}: the rate is missing")
    _check_rates(src, table.header[others[0]], rates, rdates, np.arange(len(rates)), "annual")
    pos = np.searchsorted(rdates, dates_needed)
    found = (pos < len(rdates)) & (rdates[np.minimum(pos, len(rdates) - 1)] == dates_needed)
    if not found.all():
        k = int(np.flatnonzero(~found)[0])
        raise DataError(f"{src}: no risk-free rate for date {_fmt_date(dates_needed[k])} (needed by "
                        f"{data_src}, {_row(row_numbers[k], data_dates)})")
    return rates[pos], table.header[others[0]], rdates, table


def _check_rates(src, name, rates, dates, rows, frequency):
    bad = np.flatnonzero(np.abs(rates) >= 1.0)
    if bad.size:
        i = int(bad[0])
        raise DataError(f"{src}: column '{name}', {_row(rows[i], dates)}: risk-free rate {rates[i]:.6g} is "
                        f"not a decimal rate per period (write 0.004 for 0.4% a period)")
    annual = float(np.mean(rates)) * PERIODS_PER_YEAR[frequency]
    if annual > 0.25:
        return (f"the risk-free rate averages {annual:.0%} a year once annualised ({frequency} data); "
                f"is it an annual rate given on {frequency} data? it must be per period")
    return None


# --------------------------------------------------------------------------- main reader

def _constant_columns(x: np.ndarray) -> np.ndarray:
    """Indices of columns whose values are all equal (to rounding)."""
    spread = x.max(axis=0) - x.min(axis=0)
    scale = np.maximum(1.0, np.abs(x).max(axis=0))
    return np.flatnonzero(spread <= 1e-15 * scale)


def _load(path, *, kind=None, frequency=None, date_column=None, missing="raise", risk_free=None,
          risk_free_column=None, risk_free_path=None):
    _validate_options(kind, frequency, missing, risk_free, risk_free_column, risk_free_path)
    table = _read_table(path, date_column=date_column)
    src = table.src
    header = table.header

    jd = _find_date_column(table, date_column)
    date_name = header[jd] or "(first column)"
    dates = _parse_dates(table, jd)
    _check_date_order(src, date_name, dates)

    jr = None
    if risk_free_column is not None:
        if risk_free_column not in header:
            raise DataError(f"{src}: no risk-free column named '{risk_free_column}' "
                            f"(columns: {', '.join(header)})")
        jr = header.index(risk_free_column)
        if jr == jd:
            raise DataError(f"{src}: column '{risk_free_column}' is the date column, not a rate")

    cols = [j for j in range(len(header)) if j not in (jd, jr)]
    # a nameless column with no values at all (a trailing delimiter) is ignored
    blank = [j for j in cols if header[j] == "" and j not in table.numeric and j not in table.datetimes
             and (table.cells(j) == "").all()]
    cols = [j for j in cols if j not in blank]
    if not cols:
        raise DataError(f"{src}: no asset columns (only '{date_name}'); the file needs one column per asset")
    for j in cols:
        if header[j] == "":
            raise DataError(f"{src}: column {j + 1} has no name in the header line")
    seen = {}
    for j in cols:
        if header[j] in seen:
            raise DataError(f"{src}: asset name '{header[j]}' is used twice (columns {seen[header[j]] + 1} "
                            f"and {j + 1})")
        seen[header[j]] = j
    assets = tuple(header[j] for j in cols)

    values = np.empty((table.n_rows, len(cols)), dtype=float)
    miss = np.zeros((table.n_rows, len(cols)), dtype=bool)
    for k, j in enumerate(cols):
        values[:, k], miss[:, k] = _to_numbers(table, j, dates)
    rf_col = None
    rf_miss = np.zeros(table.n_rows, dtype=bool)
    if jr is not None:
        rf_col, rf_miss = _to_numbers(table, jr, dates)

    miss_counts = miss.sum(axis=0)
    missing_by_asset = {a: int(miss_counts[k]) for k, a in enumerate(assets)}
    if jr is not None:
        missing_by_asset[header[jr] + " (risk-free)"] = int(rf_miss.sum())
    n_missing = int(miss.sum() + rf_miss.sum())
    row_has_missing = miss.any(axis=1) | rf_miss
    if n_missing and missing == "raise":
        i = int(np.flatnonzero(row_has_missing)[0])
        k = np.flatnonzero(miss[i])
        col = assets[int(k[0])] if k.size else header[jr]
        raise DataError(f"{src}: column '{col}', {_row(i, dates)}: missing value ({n_missing} missing "
                        f"cell{'s' if n_missing > 1 else ''} in {int(row_has_missing.sum())} row"
                        f"{'s' if row_has_missing.sum() > 1 else ''}); fill them in, or pass "
                        f"--missing drop-rows to drop the affected rows")
    keep = ~row_has_missing
    rows = np.flatnonzero(keep)          # 0-based data-row numbers of what is kept
    dropped = int(row_has_missing.sum())
    values = values[keep]
    if rf_col is not None:
        rf_col = rf_col[keep]
    kept_dates = dates[keep]

    if values.shape[0] == 0:
        raise DataError(f"{src}: every data row has a missing cell; nothing is left after dropping them")
    kind_inferred = kind is None
    if kind is None:
        kind = _infer_kind(src, values)

    if kind == "prices":
        _check_prices(src, assets, values, dates, rows)
        if values.shape[0] < 3:
            raise DataError(f"{src}: {values.shape[0]} price row{'s' if values.shape[0] != 1 else ''}"
                            f"{' after dropping rows with missing cells' if dropped else ''}; at least 3 "
                            f"are needed (2 returns, to estimate a volatility)")
        returns = values[1:] / values[:-1] - 1.0
        ret_rows = rows[1:]
        ret_dates = kept_dates[1:]
        if rf_col is not None:
            rf_col = rf_col[1:]
    else:
        if values.shape[0] < 2:
            raise DataError(f"{src}: {values.shape[0]} return row{'s' if values.shape[0] != 1 else ''}"
                            f"{' after dropping rows with missing cells' if dropped else ''}; at least 2 "
                            f"are needed to estimate a volatility")
        _check_returns(src, assets, values, dates, rows, declared=not kind_inferred)
        returns = values
        ret_rows = rows
        ret_dates = kept_dates

    freq_inferred = frequency is None
    notes = []
    if frequency is None:
        frequency = infer_frequency(kept_dates, src)
    else:
        try:
            looks = infer_frequency(kept_dates, src)
        except DataError:
            looks = None
        if looks is not None and looks != frequency:
            notes.append(f"frequency declared {frequency}, but the spacing of the dates looks {looks}")

    if dropped:
        notes.append(f"dropped {dropped} row{'s' if dropped > 1 else ''} with {n_missing} missing "
                     f"cell{'s' if n_missing > 1 else ''} (missing policy 'drop-rows')")
    gap = _gap_note(kept_dates, frequency)
    if gap:
        notes.append(gap)

    rf = None
    rf_desc = "none (returns are not excess returns)"
    if risk_free is not None:
        rf = np.full(returns.shape[0], float(risk_free))
        rf_desc = f"constant {float(risk_free):.6g} per period"
        note = _check_rates(src, "--risk-free", rf, ret_dates, np.arange(len(rf)), frequency)
        if note:
            notes.append(note)
    elif rf_col is not None:
        rf = rf_col
        rf_desc = f"column '{risk_free_column}'"
        note = _check_rates(src, risk_free_column, rf, dates, ret_rows, frequency)
        if note:
            notes.append(note)
    elif risk_free_path is not None:
        rf, rf_name, _, rtable = _read_risk_free_file(risk_free_path, ret_dates, src, ret_rows, dates)
        rf_desc = f"file {rtable.src} (column '{rf_name}')"
        note = _check_rates(rtable.src, rf_name, rf, dates, ret_rows, frequency)
        if note:
            notes.append(note)

    # constant assets: zero variance, before and after subtracting the risk-free rate
    const = _constant_columns(returns)
    if const.size:
        k = int(const[0])
        raise DataError(f"{src}: column '{assets[k]}': every return is {returns[0, k]:.6g}: a constant asset "
                        f"has zero variance and cannot be used")
    if rf is not None:
        returns = returns - rf[:, None]
        const = _constant_columns(returns)
        if const.size:
            raise DataError(f"{src}: column '{assets[int(const[0])]}': its return minus the risk-free rate "
                            f"is constant (zero variance); drop the column (it is the risk-free asset)")

    returns = np.ascontiguousarray(returns, dtype=np.float64)
    returns.setflags(write=False)
    out_dates = np.asarray(ret_dates, dtype="datetime64[ns]").copy()
    out_dates.setflags(write=False)
    if rf is not None:
        rf = np.asarray(rf, dtype=np.float64).copy()
        rf.setflags(write=False)
    history = History(
        returns=returns, dates=out_dates, assets=assets, frequency=frequency, source=src,
        sha256=table.sha256, risk_free=rf, excess=rf is not None, dropped_rows=dropped, kind=kind,
        notes=tuple(notes),
    )
    details = _Details(file_rows=table.n_rows, missing_by_asset=missing_by_asset,
                       kind_inferred=kind_inferred, frequency_inferred=freq_inferred,
                       missing_policy=missing, risk_free=rf_desc)
    return history, details


def load_history(path, *, kind=None, frequency=None, date_column=None, missing="raise", risk_free=None,
                 risk_free_column=None, risk_free_path=None) -> History:
    """Read a wide history file (CSV or Parquet) into a validated :class:`History`.

    Parameters
    ----------
    path : str or Path
        The file: a date column and one column per asset. ``.parquet``/``.pq``
        (or a file starting with the Parquet magic bytes) is read as Parquet,
        anything else as UTF-8 CSV (comma, semicolon or tab separated).
    kind : {"prices", "returns"}, optional
        What the cells hold. When omitted it is detected only when unambiguous:
        any value at or below zero means returns, every value at or above 1 means
        prices; otherwise :class:`DataError` asks for it. Returns are decimal
        simple returns per period (0.012 for 1.2 %).
    frequency : {"daily", "weekly", "monthly", "quarterly", "annual"}, optional
        Overrides the frequency inferred from the median spacing of the dates.
    date_column : str, optional
        The date column's name. By default a column named ``date`` (or ``dates``,
        ``time``, ``period``, ``month``, ...), else a first column of dates.
    missing : {"raise", "drop-rows"}, default "raise"
        Missing cells (empty, ``NA``, ``NaN``, ``null``...) are an error unless
        ``"drop-rows"``, which drops every row holding one and records the count
        in ``History.dropped_rows``. With prices, the return after a dropped row
        spans the gap.
    risk_free : float, optional
        A constant risk-free rate per period, subtracted from every return.
    risk_free_column : str, optional
        A column of the file holding the per-period risk-free rate (not an asset).
    risk_free_path : str or Path, optional
        A separate file (a date column and one rate column) aligned on the
        history's dates; every date of the history must be in it.

    Returns
    -------
    History
        ``returns`` (T, N) float64 per-period simple returns, excess of the
        risk-free rate when one was given; with prices, T is one less than the
        number of kept rows. ``sha256`` is the hash of the file's bytes.

    Raises
    ------
    DataError
        One line naming the file, column and data row (counted from 1 after the
        header line; the date is shown beside it when it could be read).
    SettingsError
        An option outside its allowed values.
    """
    return _load(path, kind=kind, frequency=frequency, date_column=date_column, missing=missing,
                 risk_free=risk_free, risk_free_column=risk_free_column, risk_free_path=risk_free_path)[0]


def require_rows(history: History, n: int, why: str) -> None:
    """Raise :class:`DataError` unless ``history`` has at least ``n`` return periods.

    Parameters
    ----------
    history : History
    n : int
        Fewest return periods needed.
    why : str
        Who needs them, e.g. ``"the sample covariance of 12 assets"``.
    """
    if history.n_periods < n:
        src = history.source or "the history"
        raise DataError(f"{src}: {why} needs at least {n} return periods; the history has "
                        f"{history.n_periods} ({_fmt_date(history.dates[0])} to "
                        f"{_fmt_date(history.dates[-1])})")


# --------------------------------------------------------------------------- describe

def _autocorrelation(x: np.ndarray) -> Optional[float]:
    if x.size < 3:
        return None
    d = x - x.mean()
    den = float(d @ d)
    return float(d[1:] @ d[:-1]) / den if den > 0 else None


def describe_history(history: History, *, _details: Optional[_Details] = None) -> HistorySummary:
    """Summary statistics of ``history`` (what ``noiseproof inspect`` prints).

    Means and volatilities are per period and annualised (mean x P, volatility x
    sqrt(P), with P periods a year: common practice). Volatility uses the T-1
    divisor. The correlation range is the smallest and largest off-diagonal
    sample correlation with the pair of assets that reaches it.
    """
    r = np.asarray(history.returns, dtype=float)
    ppy = history.periods_per_year
    mean = r.mean(axis=0)
    vol = r.std(axis=0, ddof=1)
    miss = _details.missing_by_asset if _details else {}
    assets = tuple(
        AssetSummary(
            name=a, mean=float(mean[k]), volatility=float(vol[k]),
            mean_annualised=float(mean[k] * ppy), volatility_annualised=float(vol[k] * math.sqrt(ppy)),
            minimum=float(r[:, k].min()), maximum=float(r[:, k].max()),
            autocorrelation=_autocorrelation(r[:, k]), missing_cells=int(miss.get(a, 0)),
        )
        for k, a in enumerate(history.assets)
    )
    cmin = cmax = pmin = pmax = None
    if history.n_assets > 1:
        c = np.corrcoef(r, rowvar=False)
        iu = np.triu_indices(history.n_assets, 1)
        off = c[iu]
        a, b = int(np.argmin(off)), int(np.argmax(off))
        cmin, cmax = float(off[a]), float(off[b])
        pmin = (history.assets[iu[0][a]], history.assets[iu[1][a]])
        pmax = (history.assets[iu[0][b]], history.assets[iu[1][b]])
    if history.risk_free is None:
        rf_desc = "none (returns are not excess returns)"
    else:
        rf_desc = "given"
    file_rows = history.n_periods + history.dropped_rows + (1 if history.kind == "prices" else 0)
    return HistorySummary(
        source=history.source, sha256=history.sha256, kind=history.kind,
        kind_inferred=_details.kind_inferred if _details else False,
        frequency=history.frequency,
        frequency_inferred=_details.frequency_inferred if _details else False,
        periods_per_year=ppy, rows=history.n_periods,
        file_rows=_details.file_rows if _details else file_rows,
        first_date=_fmt_date(history.dates[0]), last_date=_fmt_date(history.dates[-1]),
        assets=assets, missing_cells=int(sum(miss.values())),
        missing_policy=_details.missing_policy if _details else ("drop-rows" if history.dropped_rows else "raise"),
        dropped_rows=history.dropped_rows,
        risk_free=_details.risk_free if _details else rf_desc, excess=history.excess,
        correlation_min=cmin, correlation_min_pair=pmin, correlation_max=cmax, correlation_max_pair=pmax,
        notes=tuple(history.notes),
    )


def inspect_history(path, **options) -> tuple:
    """Load ``path`` with :func:`load_history`'s options; return ``(History, HistorySummary)``.

    The summary also carries what only the intake knows: missing cells per asset,
    whether the kind and frequency were inferred, the risk-free source.
    """
    history, details = _load(path, **options)
    return history, describe_history(history, _details=details)
