"""Load a panel file, validate it against the study, and describe it.

Reads CSV, Parquet, Stata ``.dta`` and Excel ``.xlsx`` with the readers pandas
already has, then checks: every named column exists (with near-name hints),
numeric columns are numeric and finite, prices and quantities are positive,
(market, period) is unique, periods parse (integers, dates, ``2019Q3``-style
quarter labels) and sort correctly, and missing values are refused unless the
study says ``drop_missing = true`` (then each dropped row is counted).
"""

from __future__ import annotations

import hashlib
import re
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from conduct.errors import DataError, suggest
from conduct.study import Study

__all__ = [
    "MARKET", "PERIOD", "TIME", "Panel", "PanelDescription", "load_panel", "read_table",
    "row_fingerprints",
]

# Internal column names added to the validated frame.
MARKET = "_market"  # market label as a string ("all" for a single time series)
PERIOD = "_period"  # period label as a string, as written by the user (normalised)
TIME = "_t"  # integer position of the period on its own calendar (for ordering, gaps, lags)

_QUARTER = re.compile(r"^\s*(\d{4})\s*[-_ ]?\s*[Qq]([1-4])\s*$")
_MONTH = re.compile(r"^\s*(\d{4})[-/](\d{1,2})\s*$")


@dataclass(frozen=True, slots=True)
class PanelDescription:
    """What the panel holds.

    Attributes
    ----------
    rows, markets, periods : int
        Rows used, distinct markets, distinct periods.
    first_period, last_period : str
        Period labels at both ends.
    balanced : bool
        Every market observed in every period.
    gaps : int
        Missing (market, period) cells inside each market's own first-to-last span.
    dropped_rows : int
        Rows dropped for missing values under ``drop_missing = true``.
    dropped_detail : dict
        Column name -> number of rows dropped because of it.
    period_kind : str
        ``integer``, ``quarter``, ``month`` or ``date``.
    sha256 : str
        Hash of the data file's bytes.
    """

    rows: int
    markets: int
    periods: int
    first_period: str
    last_period: str
    balanced: bool
    gaps: int
    dropped_rows: int
    dropped_detail: dict[str, int]
    period_kind: str
    sha256: str

    def text(self) -> str:
        """A few lines describing the panel for the terminal."""
        shape = "balanced" if self.balanced else f"unbalanced, {self.gaps} gaps inside markets"
        lines = [
            f"rows {self.rows}, markets {self.markets}, periods {self.periods} "
            f"({self.first_period} to {self.last_period}, {self.period_kind} periods), {shape}",
        ]
        if self.dropped_rows:
            detail = ", ".join(f"{k}: {v}" for k, v in sorted(self.dropped_detail.items()))
            lines.append(f"dropped {self.dropped_rows} rows with missing values ({detail})")
        return "\n".join(lines)


@dataclass(frozen=True, slots=True)
class Panel:
    """A validated panel.

    Attributes
    ----------
    frame : pandas.DataFrame
        The study's columns plus ``_market``, ``_period`` and ``_t``, sorted by market
        and period, with a fresh RangeIndex.  Numeric columns are float64.
    description : PanelDescription
    source_rows : numpy.ndarray
        For each row of ``frame``, its 1-based row number in the source file
        (counting the header as row 1 for text files), for messages.
    """

    frame: pd.DataFrame
    description: PanelDescription
    source_rows: np.ndarray


def read_table(path: Path, sheet: str | None = None, what: str = "Data file") -> pd.DataFrame:
    """Read a CSV, Parquet, Stata or Excel file into a DataFrame.

    Parameters
    ----------
    path : Path
        File to read; its suffix picks the reader.
    sheet : str or None
        Excel sheet name; required when the workbook has several sheets.
    what : str
        How to name the file in messages.

    Returns
    -------
    pandas.DataFrame

    Raises
    ------
    DataError
        When the file is missing, unreadable, empty or of an unknown type.
    """
    if path.is_dir():
        raise DataError(f"{what} {path} is a directory; give the path of a file.")
    if not path.exists():
        raise DataError(f"{what} {path} does not exist (paths are relative to the study file).")
    suffix = path.suffix.lower()
    try:
        if suffix == ".csv":
            frame = _read_csv(path, what)
        elif suffix in (".parquet", ".pq"):
            frame = pd.read_parquet(path)
        elif suffix == ".dta":
            frame = pd.read_stata(path, convert_categoricals=False)
        elif suffix == ".xlsx":
            frame = _read_excel(path, sheet, what)
        else:
            raise DataError(f"{what} {path}: files of type '{suffix}' are not read.")
    except DataError:
        raise
    except PermissionError:
        raise DataError(f"{what} {path} cannot be read: permission denied.") from None
    except Exception as exc:  # reader-specific failures become one clear message
        raise DataError(f"{what} {path} could not be read as {suffix[1:]}: {exc}.") from None
    if frame.shape[1] == 0:
        raise DataError(f"{what} {path} has no columns.")
    if len(frame) == 0:
        raise DataError(f"{what} {path} has a header but no data rows.")
    frame.columns = [str(c).strip() for c in frame.columns]
    return frame


def _read_csv(path: Path, what: str) -> pd.DataFrame:
    raw = path.read_bytes()
    if not raw.strip():
        raise DataError(f"{what} {path} is empty.")
    try:
        raw.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        raise DataError(
            f"{what} {path} is not UTF-8 text (first bad byte at offset {exc.start}); "
            "re-save it as UTF-8."
        ) from None
    try:
        return pd.read_csv(path, encoding="utf-8-sig")
    except pd.errors.ParserError as exc:
        raise DataError(f"{what} {path}: rows do not all have the same fields ({exc}).") from None
    except pd.errors.EmptyDataError:
        raise DataError(f"{what} {path} is empty.") from None


def _read_excel(path: Path, sheet: str | None, what: str) -> pd.DataFrame:
    with pd.ExcelFile(path) as book:
        names = [str(s) for s in book.sheet_names]
        if sheet is None:
            if len(names) > 1:
                raise DataError(
                    f"{what} {path} has {len(names)} sheets ({', '.join(names)}); "
                    "name one with panel.sheet."
                )
            sheet = names[0]
        if sheet not in names:
            raise DataError(
                f"{what} {path} has no sheet '{sheet}'{suggest(sheet, names)}; "
                f"sheets: {', '.join(names)}."
            )
        return pd.read_excel(book, sheet_name=sheet)


def _file_row(i: int, suffix: str) -> int:
    return i + 2 if suffix in (".csv", ".xlsx") else i + 1


def _rows_text(rows: np.ndarray, limit: int = 5) -> str:
    shown = ", ".join(str(int(r)) for r in rows[:limit])
    more = f" and {len(rows) - limit} more" if len(rows) > limit else ""
    return f"row{'s' if len(rows) > 1 else ''} {shown}{more}"


def _parse_periods(values: pd.Series, col: str, path: Path,
                   file_rows: np.ndarray) -> tuple[np.ndarray, np.ndarray, str]:
    """Return (labels, integer calendar positions, kind) for a period column.

    ``file_rows`` holds each value's row number in the file, for messages.
    """
    if pd.api.types.is_bool_dtype(values):
        raise DataError(f"Data file {path}: period column '{col}' holds true/false values.")
    if pd.api.types.is_datetime64_any_dtype(values):
        stamps = pd.DatetimeIndex(values)
        return (
            np.asarray(stamps.strftime("%Y-%m-%d"), dtype=object),
            _rank(stamps.asi8),
            "date",
        )
    if pd.api.types.is_numeric_dtype(values):
        arr = values.to_numpy(dtype=float)
        if not np.all(np.isfinite(arr)) or not np.all(arr == np.round(arr)):
            bad = np.flatnonzero(~np.isfinite(arr) | (arr != np.round(arr)))
            raise DataError(
                f"Data file {path}: period column '{col}' has non-integer values at "
                f"{_rows_text(file_rows[bad])}; periods must be integers, dates or labels like "
                "2019Q3."
            )
        ints = arr.astype(np.int64)
        return np.asarray([str(v) for v in ints], dtype=object), ints, "integer"
    text = values.astype(str).str.strip()
    if text.str.fullmatch(r"-?\d+").all():  # integers stored as text
        ints = text.astype(np.int64).to_numpy()
        return np.asarray([str(v) for v in ints], dtype=object), ints, "integer"
    q = text.str.extract(_QUARTER)
    if q.notna().all().all():
        years, qs = q[0].astype(int).to_numpy(), q[1].astype(int).to_numpy()
        labels = np.asarray([f"{y}Q{k}" for y, k in zip(years, qs, strict=True)], dtype=object)
        return labels, years * 4 + (qs - 1), "quarter"
    m = text.str.extract(_MONTH)
    if m.notna().all().all():
        years, ms = m[0].astype(int).to_numpy(), m[1].astype(int).to_numpy()
        if ((ms >= 1) & (ms <= 12)).all():
            labels = np.asarray([f"{y}-{k:02d}" for y, k in zip(years, ms, strict=True)],
                                dtype=object)
            return labels, years * 12 + (ms - 1), "month"
    try:
        stamps = pd.DatetimeIndex(pd.to_datetime(text, format="ISO8601"))
    except (ValueError, TypeError):
        # name the values that parse neither way; if every value parses on its own,
        # the column mixes kinds: name the values that are not quarter labels
        is_quarter = q.notna().all(axis=1).to_numpy()
        is_date = pd.to_datetime(text, format="ISO8601", errors="coerce").notna().to_numpy()
        bad = np.flatnonzero(~is_quarter & ~is_date)
        if not len(bad):
            bad = np.flatnonzero(~is_quarter)
        example = text.iloc[int(bad[0])]
        raise DataError(
            f"Data file {path}: period column '{col}' has values that are not integers, "
            f"ISO dates (2019-07-01) or quarter labels (2019Q3), e.g. '{example}' at "
            f"{_rows_text(file_rows[bad])}."
        ) from None
    return np.asarray(stamps.strftime("%Y-%m-%d"), dtype=object), _rank(stamps.asi8), "date"


def _rank(keys: np.ndarray) -> np.ndarray:
    uniq = np.unique(keys)
    return np.searchsorted(uniq, keys).astype(np.int64)


def _check_columns(frame: pd.DataFrame, study: Study) -> None:
    present = list(frame.columns)
    for col in study.columns():
        if col not in present:
            listing = ", ".join(present[:25]) + (" ..." if len(present) > 25 else "")
            raise DataError(
                f"Data file {study.panel.file}: column '{col}' named in the study file "
                f"{study.path.name} is not in the data{suggest(col, present)}. "
                f"Columns present: {listing}."
            )


def _to_numeric(frame: pd.DataFrame, col: str, path: Path, file_rows: np.ndarray) -> pd.Series:
    s = frame[col]
    if pd.api.types.is_bool_dtype(s):
        return s.astype(float)
    if pd.api.types.is_numeric_dtype(s):
        return s.astype(float)
    converted = pd.to_numeric(s, errors="coerce")
    bad = np.flatnonzero(converted.isna().to_numpy() & s.notna().to_numpy())
    if len(bad):
        example = s.iloc[int(bad[0])]
        hint = ""
        if isinstance(example, str) and re.fullmatch(r"\s*-?[\d.]+,\d+\s*", example):
            hint = (" It looks like a decimal comma or thousands separator; convert the file "
                    "to plain numbers (e.g. 1234.5) first.")
        raise DataError(
            f"Data file {path}: column '{col}' must be numeric but has text such as "
            f"'{example}' at {_rows_text(file_rows[bad])}.{hint}"
        )
    return converted.astype(float)


def load_panel(study: Study) -> Panel:
    """Load and validate the study's panel.

    Parameters
    ----------
    study : Study
        A validated study.

    Returns
    -------
    Panel
        The validated panel and its description.

    Raises
    ------
    DataError
        For any problem with the file or its contents; the message names the
        file, the column and the rows.
    """
    spec = study.panel
    path = spec.file
    frame = read_table(path, spec.sheet)
    sha = hashlib.sha256(path.read_bytes()).hexdigest()
    _check_columns(frame, study)
    suffix = path.suffix.lower()
    cols = list(study.columns())
    frame = frame[cols].copy()
    file_rows = np.asarray([_file_row(i, suffix) for i in range(len(frame))])

    numeric = study.numeric_columns()
    for col in numeric:
        frame[col] = _to_numeric(frame, col, path, file_rows)

    # Missing values: refuse, or drop and count.
    miss = frame.isna()
    dropped_detail: dict[str, int] = {}
    if miss.to_numpy().any():
        if not spec.drop_missing:
            col = next(c for c in cols if miss[c].any())
            rows = file_rows[miss[col].to_numpy()]
            raise DataError(
                f"Data file {path}: column '{col}' has missing values at {_rows_text(rows)}. "
                "Fill them, or set drop_missing = true under [panel] to drop such rows "
                "(every dropped row is counted in the output)."
            )
        for col in cols:
            n = int(miss[col].sum())
            if n:
                dropped_detail[col] = n
        keep = ~miss.any(axis=1).to_numpy()
        frame = frame.loc[keep].reset_index(drop=True)
        file_rows = file_rows[keep]
        if len(frame) == 0:
            raise DataError(f"Data file {path}: every row has a missing value; nothing is left.")
    dropped = len(miss) - len(frame)

    for col in numeric:
        vals = frame[col].to_numpy()
        bad = np.flatnonzero(~np.isfinite(vals))
        if len(bad):
            raise DataError(
                f"Data file {path}: column '{col}' has infinite values at "
                f"{_rows_text(file_rows[bad])}."
            )
    for role, col in (("price", spec.price), ("quantity", spec.quantity)):
        vals = frame[col].to_numpy()
        bad = np.flatnonzero(vals <= 0)
        if len(bad):
            raise DataError(
                f"Data file {path}: {role} column '{col}' must be positive, but has "
                f"{vals[bad[0]]:g} at {_rows_text(file_rows[bad])}."
            )
    if spec.concentration:
        vals = frame[spec.concentration].to_numpy()
        bad = np.flatnonzero((vals <= 0) | (vals > 1))
        if len(bad):
            raise DataError(
                f"Data file {path}: concentration column '{spec.concentration}' must be a "
                f"Herfindahl index as a share in (0, 1], but has {vals[bad[0]]:g} at "
                f"{_rows_text(file_rows[bad])} (divide an index on the 0-10,000 scale by 10,000)."
            )
    if spec.sellers:
        vals = frame[spec.sellers].to_numpy()
        bad = np.flatnonzero((vals < 1) | (vals != np.round(vals)))
        if len(bad):
            raise DataError(
                f"Data file {path}: sellers column '{spec.sellers}' must hold whole numbers "
                f">= 1, but has {vals[bad[0]]:g} at {_rows_text(file_rows[bad])}."
            )

    labels, t, kind = _parse_periods(frame[spec.period], spec.period, path, file_rows)
    frame[PERIOD] = labels
    frame[TIME] = t
    if spec.market is None:
        frame[MARKET] = "all"
    else:
        mk = frame[spec.market]
        if pd.api.types.is_float_dtype(mk) and np.all(mk == np.round(mk)):
            mk = mk.astype(np.int64)
        frame[MARKET] = mk.astype(str).str.strip()

    dup = frame.duplicated([MARKET, TIME], keep=False).to_numpy()
    if dup.any():
        i = int(np.flatnonzero(dup)[0])
        first = np.flatnonzero(((frame[MARKET] == frame[MARKET].iloc[i])
                                & (frame[TIME] == frame[TIME].iloc[i])).to_numpy())
        where = (f"market '{frame[MARKET].iloc[i]}', " if spec.market else "") + \
            f"period '{frame[PERIOD].iloc[i]}'"
        what = "(market, period) pair" if spec.market else "period"
        hint = "" if spec.market else (
            " Several markets in one file need panel.market to name the market column."
        )
        raise DataError(
            f"Data file {path}: each {what} must appear once, but {where} repeats "
            f"({_rows_text(file_rows[first])}).{hint}"
        )

    order = np.lexsort((frame[TIME].to_numpy(), frame[MARKET].to_numpy()))
    frame = frame.iloc[order].reset_index(drop=True)
    file_rows = file_rows[order]

    n_markets = int(frame[MARKET].nunique())
    periods = frame.drop_duplicates(TIME).sort_values(TIME)
    n_periods = len(periods)
    balanced = len(frame) == n_markets * n_periods
    span = frame.groupby(MARKET)[TIME].agg(["min", "max", "count"])
    step = 1 if kind in ("quarter", "month", "integer") else None
    if step is None:
        gaps = 0
        all_t = np.sort(frame[TIME].unique())
        pos = {v: i for i, v in enumerate(all_t)}
        for _, g in frame.groupby(MARKET):
            idx = [pos[v] for v in g[TIME]]
            gaps += (max(idx) - min(idx) + 1) - len(idx)
    else:
        gaps = int(((span["max"] - span["min"] + 1) - span["count"]).sum())
    desc = PanelDescription(
        rows=len(frame),
        markets=n_markets,
        periods=n_periods,
        first_period=str(periods[PERIOD].iloc[0]),
        last_period=str(periods[PERIOD].iloc[-1]),
        balanced=bool(balanced),
        gaps=gaps,
        dropped_rows=int(dropped),
        dropped_detail=dropped_detail,
        period_kind=kind,
        sha256=sha,
    )
    return Panel(frame=frame, description=desc, source_rows=file_rows)


def row_fingerprints(panel: Panel, columns: tuple[str, ...]) -> pd.DataFrame:
    """A short hash of each row's values, keyed by market and period.

    Parameters
    ----------
    panel : Panel
    columns : tuple of str
        The study's data columns (values are hashed as text with 12 significant digits).

    Returns
    -------
    pandas.DataFrame
        Columns ``market``, ``period`` and ``hash``; two runs' tables tell which
        rows are new and which changed value (data revisions).
    """
    f = panel.frame
    parts = []
    for c in columns:
        v = f[c]
        if pd.api.types.is_float_dtype(v):
            parts.append(v.map(lambda x: f"{x:.12g}"))
        else:
            parts.append(v.astype(str))
    joined = pd.concat(parts, axis=1).agg("\x1f".join, axis=1) if parts else pd.Series("")
    hashes = [hashlib.sha1(s.encode("utf-8")).hexdigest()[:16] for s in joined]
    return pd.DataFrame({"market": f[MARKET].to_numpy(), "period": f[PERIOD].to_numpy(),
                         "hash": hashes})
