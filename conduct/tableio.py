"""Reading data files and their keys: the file-level helpers every table shares.

:func:`read_table` reads CSV, Parquet, Stata ``.dta`` and Excel ``.xlsx`` with
the readers pandas has; :func:`parse_periods` turns a period column into
normalised labels and integer positions on its own calendar (integers,
``2019Q3``-style quarters, ``2019-07`` months, ISO dates); :func:`market_labels`
normalises market identifiers; :func:`to_numeric` converts a column and names
the rows that are not numbers.  Messages name the file, the column and the
rows in the file (the header of a text file is row 1).
"""

from __future__ import annotations

import hashlib
import re
import unicodedata
from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from conduct.errors import DataError, suggest

__all__ = [
    "MARKET", "PARQUET_SUFFIXES", "PERIOD", "TIME", "PeriodCodes", "file_row", "file_rows",
    "file_sha256", "market_codes", "market_labels", "parquet_files", "parse_periods",
    "period_codes", "read_table", "rows_text", "take_labels", "to_numeric",
]

# Internal column names of assembled and validated frames.
MARKET = "_market"  # market label as a string ("all" for a single time series)
PERIOD = "_period"  # period label as a string, as written by the user (normalised)
TIME = "_t"  # integer position of the period on its own calendar (for ordering, gaps, lags)

_QUARTER = re.compile(r"^\s*(\d{4})\s*[-_ ]?\s*[Qq]([1-4])\s*$")
_QUARTER_FIRST = re.compile(r"^\s*[Qq]([1-4])\s*[-_/ ]?\s*(\d{4})\s*$")  # "Q1 2016"
_MONTH = re.compile(r"^\s*(\d{4})[-/](\d{1,2})\s*$")
PARQUET_SUFFIXES = (".parquet", ".pq")


def parquet_files(path: Path) -> list[Path]:
    """The Parquet files of a dataset directory, in sorted order.

    Files and folders whose names start with ``.`` or ``_`` (``_metadata``,
    ``_SUCCESS``, checksums) are passed over, as Parquet readers do.

    Parameters
    ----------
    path : Path
        A directory.

    Returns
    -------
    list of Path
        Every ``.parquet`` or ``.pq`` file below ``path`` (empty for a plain folder).
    """
    out = []
    for p in sorted(path.rglob("*")):
        parts = p.relative_to(path).parts
        if any(part.startswith((".", "_")) for part in parts):
            continue
        if p.suffix.lower() in PARQUET_SUFFIXES and p.is_file():
            out.append(p)
    return out


def read_table(path: Path, sheet: str | None = None, what: str = "Data file",
               sheet_key: str = "panel.sheet",
               csv_options: dict[str, str] | None = None) -> pd.DataFrame:
    """Read a CSV, Parquet, Stata or Excel file into a DataFrame.

    Parameters
    ----------
    path : Path
        File to read; its suffix picks the reader.
    sheet : str or None
        Excel sheet name; required when the workbook has several sheets.
    what : str
        How to name the file in messages.
    sheet_key : str
        The study-file key that names the sheet, for messages.

    Returns
    -------
    pandas.DataFrame

    Raises
    ------
    DataError
        When the file is missing, unreadable, empty or of an unknown type.
    """
    try:
        is_dir, exists = path.is_dir(), path.exists()
    except (OSError, ValueError) as exc:
        raise DataError(f"{what} {path} cannot be opened: "
                        f"{getattr(exc, 'strerror', None) or exc}.") from None
    if is_dir:
        if parquet_files(path):
            raise DataError(
                f"{what} {path} is a directory of Parquet files. A Parquet dataset partitioned "
                "by market is read part by part only as the main panel (partitioned = true "
                "under [panel]) and only by conduct estimate and conduct check (in Python, "
                "conduct.estimate_partitioned); other commands, and conduct.estimate, read a "
                "single file."
            )
        raise DataError(f"{what} {path} is a directory; give the path of a file.")
    if not exists:
        raise DataError(f"{what} {path} does not exist (paths are relative to the study file).")
    suffix = path.suffix.lower()
    try:
        if suffix == ".csv":
            frame = _read_csv(path, what, csv_options or {})
        elif suffix in (".parquet", ".pq"):
            frame = pd.read_parquet(path)
        elif suffix == ".dta":
            frame = _read_stata(path)
        elif suffix == ".xlsx":
            frame = _read_excel(path, sheet, what, sheet_key)
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
    # names compared in composed Unicode form (files from some tools are decomposed)
    frame.columns = [unicodedata.normalize("NFC", str(c).strip()) for c in frame.columns]
    return frame


def _read_stata(path: Path) -> pd.DataFrame:
    """A Stata file with codes kept; value labels go to ``attrs['value_labels']``.

    Labelled market or period columns are fine as codes, but a labelled column
    in a numeric role (price, an instrument) holds category codes, not numbers;
    :func:`to_numeric` refuses those, naming the labels.
    """
    frame = pd.read_stata(path, convert_categoricals=False)
    labels: dict[str, list[str]] = {}
    try:
        named = pd.read_stata(path, convert_categoricals=True)
        for col in named.columns:
            if isinstance(named[col].dtype, pd.CategoricalDtype):
                labels[str(col)] = [str(c) for c in named[col].cat.categories]
    except ValueError:  # repeated labels pandas cannot turn into categories
        with pd.io.stata.StataReader(path) as reader:
            reader.read(convert_categoricals=False)
            sets = reader.value_labels()
            # each variable's label-set name (pandas keeps it privately); else same name
            attached = getattr(reader, "_lbllist", None)
        names = (list(attached) if attached is not None and len(attached) == frame.shape[1]
                 else [str(c) for c in frame.columns])
        labels = {str(c): [str(v) for v in sets[name].values()]
                  for c, name in zip(frame.columns, names, strict=True) if name in sets}
    frame.attrs["value_labels"] = labels
    return frame


def _read_csv(path: Path, what: str, options: dict[str, str]) -> pd.DataFrame:
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
        frame = pd.read_csv(path, encoding="utf-8-sig", **options)
    except pd.errors.ParserError as exc:
        m = re.search(r"EOF inside string starting at row (\d+)", str(exc))
        if m:  # pandas counts data rows from 0; the file line adds the header and 1
            raise DataError(
                f"{what} {path}: an opening quote on line {int(m.group(1)) + 1} is never "
                "closed, so the rest of the file reads as one text cell; close or remove it."
            ) from None
        raise DataError(f"{what} {path}: rows do not all have the same fields ({exc}).") from None
    except pd.errors.EmptyDataError:
        raise DataError(f"{what} {path} is empty.") from None
    if frame.shape[1] == 1 and "sep" not in options:
        header = str(frame.columns[0])
        for sep, name, written in ((";", "semicolons", '";"'), ("\t", "tabs", '"\\t"'),
                                   ("|", "bars", '"|"')):
            if sep in header:
                first = header.split(sep)[0].strip()
                raise DataError(
                    f"{what} {path} was read as a single column '{header[:60]}': its fields "
                    f"seem to be separated by {name}, not commas, so columns such as "
                    f"'{first}' are not found on their own. Say so with delimiter = "
                    f"{written} under [panel]."
                )
    return frame


def _read_excel(path: Path, sheet: str | None, what: str, sheet_key: str) -> pd.DataFrame:
    with pd.ExcelFile(path) as book:
        names = [str(s) for s in book.sheet_names]
        if sheet is None:
            if len(names) > 1:
                raise DataError(
                    f"{what} {path} has {len(names)} sheets ({', '.join(names)}); "
                    f"name one with {sheet_key}."
                )
            sheet = names[0]
        if sheet not in names:
            raise DataError(
                f"{what} {path} has no sheet '{sheet}'{suggest(sheet, names)}; "
                f"sheets: {', '.join(names)}."
            )
        return pd.read_excel(book, sheet_name=sheet)


def file_row(i: int, suffix: str) -> int:
    """Row number in the file of data row ``i`` (0-based): text files count the header."""
    return i + 2 if suffix in (".csv", ".xlsx") else i + 1


def rows_text(rows: np.ndarray, limit: int = 5) -> str:
    """``row 5`` or ``rows 5, 9, 12 and 3 more`` for messages."""
    shown = ", ".join(str(int(r)) for r in rows[:limit])
    more = f" and {len(rows) - limit} more" if len(rows) > limit else ""
    return f"row{'s' if len(rows) > 1 else ''} {shown}{more}"


def _labels(positions: np.ndarray, text: Callable[[int], str]) -> np.ndarray:
    """Label of each row's calendar position, formatting each distinct position once."""
    inverse, uniq = pd.factorize(positions)
    return np.asarray([text(int(v)) for v in uniq], dtype=object)[inverse]


@dataclass(frozen=True, slots=True)
class PeriodCodes:
    """A period column coded on its calendar: each row's period among the distinct ones.

    Attributes
    ----------
    codes : numpy.ndarray
        (n,) int64 position of each row's period in ``labels`` and ``t``.
    labels : numpy.ndarray
        (G,) object array of the normalised labels of the distinct periods.
    t : numpy.ndarray
        (G,) int64 calendar positions of the distinct periods, increasing.
    kind : str
        ``integer``, ``quarter``, ``month`` or ``date``.
    """

    codes: np.ndarray
    labels: np.ndarray
    t: np.ndarray
    kind: str


def parse_periods(values: pd.Series, col: str, path: Path, file_rows: np.ndarray,
                  what: str = "Data file") -> tuple[np.ndarray, np.ndarray, str]:
    """Return (labels, integer calendar positions, kind) for a period column.

    ``file_rows`` holds each value's row number in the file, for messages.

    Parameters
    ----------
    values : pandas.Series
        The period column.
    col : str
        Its name, for messages.
    path : Path
        Its file, for messages.
    file_rows : numpy.ndarray
        Each value's row number in the file, for messages.
    what : str
        How to name the file in messages.

    Returns
    -------
    (numpy.ndarray, numpy.ndarray, str)
        Each row's normalised label (object array), its int64 calendar position,
        and the period kind.

    Raises
    ------
    DataError
        For values that are neither integers, dates, months nor quarter labels.
    """
    coded = period_codes(values, col, path, file_rows, what)
    return coded.labels[coded.codes], coded.t[coded.codes], coded.kind


def period_codes(values: pd.Series, col: str, path: Path, file_rows: np.ndarray,
                 what: str = "Data file") -> PeriodCodes:
    """A period column parsed as :func:`parse_periods` does, returned as codes.

    A column of text, integers, floats or timestamps is parsed on its distinct
    values only (a panel repeats each period once per market): whether a
    column is integers, quarters, months or dates, each value's label and its
    position depend on the set of values and on the value itself, never on
    how often or where it occurs.  When the distinct values fail, the whole
    column is parsed again, so the message names every row as it does without
    this shortcut.  Other columns (mixed Python objects, categories) are
    parsed row by row.

    Parameters
    ----------
    values, col, path, file_rows, what
        As for :func:`parse_periods`.

    Returns
    -------
    PeriodCodes

    Raises
    ------
    DataError
        As :func:`parse_periods`.
    """
    distinct = _distinct(values, floats=True)
    if distinct is not None:
        raw, uniq = distinct
        try:  # rows in messages come from the row-by-row pass below
            labels, t, kind = _parse_rows(uniq, col, path, np.zeros(len(uniq), np.int64),
                                          what)
        except DataError:
            pass
        else:
            return _on_calendar(raw, labels, t, kind)
    labels, t, kind = _parse_rows(values, col, path, file_rows, what)
    return _on_calendar(np.arange(len(t), dtype=np.int64), labels, t, kind)


def _on_calendar(raw: np.ndarray, labels: np.ndarray, t: np.ndarray, kind: str) -> PeriodCodes:
    """Codes in calendar order from each row's index ``raw`` into (labels, t).

    A period's label is a function of its position (``t`` is the integer, the
    quarter or month count, or the rank of the timestamp), so the distinct
    positions carry the distinct labels.
    """
    by_t, distinct_t = pd.factorize(np.asarray(t, dtype=np.int64))  # in order of appearance
    seen = np.maximum.accumulate(by_t)
    first = np.flatnonzero(np.r_[len(seen) > 0, seen[1:] > seen[:-1]])  # first of each
    order = np.argsort(distinct_t, kind="stable")
    rank = np.empty(len(order), dtype=np.int64)
    rank[order] = np.arange(len(order))
    return PeriodCodes(codes=rank[by_t][raw], labels=np.asarray(labels, dtype=object)[first][order],
                       t=np.asarray(distinct_t, dtype=np.int64)[order], kind=kind)


def _distinct(values: pd.Series, floats: bool) -> tuple[np.ndarray, pd.Series] | None:
    """Each row's index among the distinct values, and those values (same dtype).

    None unless hashing keeps every value apart that parsing tells apart: text
    (a string dtype, or Python strings only), integers, timestamps and, with
    ``floats``, floats (hashing merges 0.0 with -0.0).  Missing values form one
    distinct value of their own.
    """
    dtype = values.dtype
    exact = isinstance(dtype, pd.StringDtype | pd.DatetimeTZDtype) or (
        isinstance(dtype, np.dtype) and dtype.kind in ("iuMf" if floats else "iuM"))
    if not exact and pd.api.types.is_object_dtype(dtype):
        exact = pd.api.types.infer_dtype(values, skipna=False) == "string"
    if not exact:
        return None
    raw, uniq = pd.factorize(values, use_na_sentinel=False)
    return raw.astype(np.int64, copy=False), pd.Series(uniq, name=values.name)


def _parse_rows(values: pd.Series, col: str, path: Path, file_rows: np.ndarray,
                what: str) -> tuple[np.ndarray, np.ndarray, str]:
    """:func:`parse_periods` on every row."""
    if pd.api.types.is_bool_dtype(values):
        raise DataError(f"{what} {path}: period column '{col}' holds true/false values.")
    if pd.api.types.is_datetime64_any_dtype(values):
        stamps = pd.DatetimeIndex(values)
        return (
            np.asarray(stamps.strftime("%Y-%m-%d"), dtype=object),
            _rank(stamps.asi8),
            "date",
        )
    if pd.api.types.is_numeric_dtype(values):
        arr = values.to_numpy(dtype=float)
        wrong = ~np.isfinite(arr) | (arr != np.round(arr)) | (np.abs(arr) >= 2.0**53)
        if wrong.any():
            bad = np.flatnonzero(wrong)
            raise DataError(
                f"{what} {path}: period column '{col}' has non-integer values at "
                f"{rows_text(file_rows[bad])}; periods must be integers, dates or labels like "
                "2019Q3."
            )
        ints = arr.astype(np.int64)
        return _labels(ints, str), ints, "integer"
    text = values.astype(str).str.strip()
    if text.str.fullmatch(r"-?\d+").all():  # integers stored as text
        ints = text.astype(np.int64).to_numpy()
        return _labels(ints, str), ints, "integer"
    q = text.str.extract(_QUARTER)
    if not q.notna().all().all():
        first = text.str.extract(_QUARTER_FIRST)
        if first.notna().all().all():
            q = first[[1, 0]].set_axis([0, 1], axis=1)
    if q.notna().all().all():
        years, qs = q[0].astype(int).to_numpy(), q[1].astype(int).to_numpy()
        pos = years * 4 + (qs - 1)
        return _labels(pos, lambda v: f"{v // 4}Q{v % 4 + 1}"), pos, "quarter"
    m = text.str.extract(_MONTH)
    if m.notna().all().all():
        years, ms = m[0].astype(int).to_numpy(), m[1].astype(int).to_numpy()
        if ((ms >= 1) & (ms <= 12)).all():
            pos = years * 12 + (ms - 1)
            return _labels(pos, lambda v: f"{v // 12}-{v % 12 + 1:02d}"), pos, "month"
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
            f"{what} {path}: period column '{col}' has values that are not integers, "
            f"ISO dates (2019-07-01) or quarter labels (2019Q3), e.g. '{example}' at "
            f"{rows_text(file_rows[bad])}."
        ) from None
    return np.asarray(stamps.strftime("%Y-%m-%d"), dtype=object), _rank(stamps.asi8), "date"


def _rank(keys: np.ndarray) -> np.ndarray:
    uniq = np.unique(keys)
    return np.searchsorted(uniq, keys).astype(np.int64)


def to_numeric(frame: pd.DataFrame, col: str, path: Path, file_rows: np.ndarray,
               what: str = "Data file") -> pd.Series:
    """Column ``col`` as float64; text that is not a number is an error naming the rows."""
    s = frame[col]
    labels = frame.attrs.get("value_labels", {}).get(col)
    if labels:
        shown = ", ".join(f"'{v}'" for v in labels[:4]) + (", ..." if len(labels) > 4 else "")
        raise DataError(
            f"{what} {path}: column '{col}' carries Stata value labels ({shown}), so its "
            "values are category codes, not measured numbers, and cannot serve as a price, "
            "quantity, shifter or instrument. Give the numeric variable instead, or, if the "
            f"codes really are the numbers, drop the labels in Stata (label values {col}) "
            "and save again."
        )
    if pd.api.types.is_bool_dtype(s):
        return s.astype(float)
    if pd.api.types.is_numeric_dtype(s):
        return s.astype(float)
    converted = pd.to_numeric(s, errors="coerce")
    bad = np.flatnonzero(converted.isna().to_numpy() & s.notna().to_numpy())
    if len(bad):
        example = s.iloc[int(bad[0])]
        hint = ""
        if isinstance(example, str) and re.fullmatch(r"\s*-?\d{1,3}(,\d{3})+(\.\d+)?\s*",
                                                      example):
            hint = (" It looks like a thousands separator (or a decimal comma): read it with "
                    "thousands = \",\" (or decimal = \",\") under [panel], or convert the file "
                    "to plain numbers such as 1234.5.")
        elif isinstance(example, str) and re.fullmatch(r"\s*-?[\d.]*\d,\d+\s*", example):
            hint = (" It looks like a decimal comma: read it with decimal = \",\" under "
                    "[panel] (and thousands = \".\" if dots group thousands), or convert the "
                    "file to plain numbers such as 1234.5.")
        raise DataError(
            f"{what} {path}: column '{col}' must be numeric but has text such as "
            f"'{example}' at {rows_text(file_rows[bad])}.{hint}"
        )
    return converted.astype(float)


def file_rows(n: int, path: Path) -> np.ndarray:
    """Row numbers in the file of data rows ``0..n-1`` (see :func:`file_row`)."""
    return np.arange(n, dtype=np.int64) + file_row(0, path.suffix.lower())


def file_sha256(path: Path) -> str:
    """SHA-256 of the file's bytes."""
    return hashlib.sha256(path.read_bytes()).hexdigest()


def market_codes(values: pd.Series, rows: np.ndarray | None = None
                 ) -> tuple[np.ndarray, np.ndarray]:
    """Market identifiers as :func:`market_labels` makes them, coded in sorted order.

    Text and integer identifiers are normalised on their distinct values only
    (the result for a value depends on the value alone); floats, whose text
    depends on the whole column, row by row.

    Parameters
    ----------
    values : pandas.Series
        The market column, without missing values.
    rows : numpy.ndarray or None
        Each value's row number in the file, for messages.

    Returns
    -------
    (numpy.ndarray, numpy.ndarray)
        (n,) int64 codes into the labels, and the (G,) distinct labels (object
        array) in the order pandas sorts the column of labels.

    Raises
    ------
    DataError
        For non-finite float identifiers.
    """
    distinct = _distinct(values, floats=False)
    if distinct is not None:
        raw, uniq = distinct
        labels = market_labels(uniq)
    else:
        raw, labels = np.arange(len(values), dtype=np.int64), market_labels(values, rows)
    # sorted as pandas sorts the column these labels make (see take_labels)
    by_label, distinct_labels = pd.factorize(pd.Series(labels), sort=True,
                                             use_na_sentinel=False)
    return (by_label.astype(np.int64, copy=False)[raw],
            np.asarray(distinct_labels, dtype=object))


def take_labels(labels: np.ndarray, codes: np.ndarray) -> pd.api.extensions.ExtensionArray:
    """The column pandas makes of ``labels[codes]``, built from the distinct labels.

    Parameters
    ----------
    labels : numpy.ndarray
        (G,) object array of labels.
    codes : numpy.ndarray
        (n,) positions into ``labels``.

    Returns
    -------
    pandas.api.extensions.ExtensionArray
        Of the dtype pandas infers for the labels (``str`` for text under
        pandas 3, ``object`` before), without a Python object per row.
    """
    return pd.Series(labels).array.take(codes)


def market_labels(values: pd.Series, rows: np.ndarray | None = None) -> np.ndarray:
    """Market identifiers as stripped strings; whole floats lose their ``.0`` (3.0 -> '3')."""
    mk = values
    if pd.api.types.is_float_dtype(mk):
        arr = mk.to_numpy(dtype=float)
        whole = np.isfinite(arr) & (arr == np.round(arr)) & (np.abs(arr) < 2.0**53)
        if whole.all():
            mk = mk.astype(np.int64)
        elif not np.isfinite(arr).all():
            bad = np.flatnonzero(~np.isfinite(arr))
            where = rows_text(rows[bad]) if rows is not None else f"{len(bad)} row(s)"
            raise DataError(
                f"The market column '{values.name}' holds non-finite identifiers (e.g. "
                f"{float(arr[bad[0]])}) at {where}; market identifiers must be labels or "
                "whole numbers."
            )
        else:
            mk = pd.Series([repr(float(v)) for v in arr], index=mk.index)
    return mk.astype(str).str.strip().to_numpy(dtype=object)
