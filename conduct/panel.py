"""Load the study's panel, validate it, and describe it.

The panel is first assembled from its sources (:mod:`conduct.assemble`: the
main table, joined sources, firm aggregates, derived variables), then checked:
numeric columns are numeric and finite, prices and quantities are positive,
(market, period) is unique, periods parse (integers, dates, ``2019Q3``-style
quarter labels) and sort correctly, and missing values are refused unless the
study says ``drop_missing = true`` (then each dropped row is counted).  Files
are read with the readers pandas has (:mod:`conduct.tableio`).
"""

from __future__ import annotations

import hashlib
from dataclasses import dataclass, field, replace
from pathlib import Path

import numpy as np
import pandas as pd

from conduct.assemble import assemble
from conduct.coverage import Assembly, SourceRecord
from conduct.errors import DataError
from conduct.study import Study
from conduct.tableio import MARKET, PERIOD, TIME, read_table, rows_text

__all__ = [
    "MARKET", "PERIOD", "TIME", "Panel", "PanelDescription", "check_values", "describe_assembly",
    "load_panel",
    "read_table", "row_fingerprints", "write_panel",
]


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
        Hash of the data file's bytes; with several sources, one hash over every
        source's name and hash (each source's own hash is in ``Panel.sources``).
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
        For each row of ``frame``, its 1-based row number in the main data file
        (counting the header as row 1 for text files), for messages.
    assembly : Assembly or None
        Sources with their hashes and join coverage, derived variables, and the
        assembled table (:mod:`conduct.coverage`).
    coded : (pandas.DataFrame, numpy.ndarray) or None
        The frame the market codes were made for and the codes (read-only); see
        :meth:`market_codes`.
    """

    frame: pd.DataFrame
    description: PanelDescription
    source_rows: np.ndarray
    assembly: Assembly | None = None
    coded: tuple[pd.DataFrame, np.ndarray] | None = field(default=None, repr=False,
                                                          compare=False)

    def market_codes(self) -> np.ndarray:
        """Codes 0..G-1 of each row's market, in the sorted order of the labels.

        Kept from loading when ``coded`` holds this very frame (a panel made by
        ``dataclasses.replace`` with another frame recomputes them), else coded
        from ``_market``; equal to ``np.unique(frame['_market'], return_inverse=True)[1]``.
        """
        if self.coded is not None and self.coded[0] is self.frame:
            return self.coded[1]
        return pd.factorize(self.frame[MARKET], sort=True)[0].astype(np.int64, copy=False)

    @property
    def sources(self) -> tuple[SourceRecord, ...]:
        """Every data file read: the main table, joined sources, the firm table."""
        return self.assembly.sources if self.assembly is not None else ()


def _missing(frame: pd.DataFrame, cols: list[str], study: Study, rows: np.ndarray,
             origin: Assembly
             ) -> tuple[pd.DataFrame, np.ndarray, dict[str, int], np.ndarray | None]:
    """Apply the missing-value rule to the used columns: refuse, or drop and count.

    Returns the rows kept, their numbers in the file, the count of dropped rows
    by column, and the mask of rows kept (None when every row is kept).
    """
    spec = study.panel
    miss = {col: frame[col].isna().to_numpy() for col in cols}
    detail: dict[str, int] = {}
    if not any(m.any() for m in miss.values()):
        return frame, rows, detail, None
    if not spec.drop_missing:
        col = next(c for c in cols if miss[c].any())
        raise DataError(
            f"Data file {spec.file}: column '{col}'{origin.origin(col)} has missing values at "
            f"{rows_text(rows[miss[col]])}. Fill them, or set drop_missing = true "
            "under [panel] to drop such rows (every dropped row is counted in the output)."
        )
    for col in cols:
        n = int(np.count_nonzero(miss[col]))
        if n:
            detail[col] = n
    keep = ~np.logical_or.reduce([miss[c] for c in cols])
    frame = frame.loc[keep].reset_index(drop=True)
    rows = rows[keep]
    if len(frame) == 0:
        raise DataError(f"Data file {spec.file}: every row has a missing value; nothing is left.")
    return frame, rows, detail, keep


MAX_MAGNITUDE = 1e100  # squares and cross-products must stay finite in double precision
MIN_MAGNITUDE = 1e-100


def check_values(frame: pd.DataFrame, study: Study, rows: np.ndarray,
                 origin: Assembly) -> None:
    """Refuse values the estimation cannot use, naming the file, column and rows.

    Finite numbers of sensible magnitude; positive price and quantity; H in
    (0, 1]; whole sellers >= 1.

    Parameters
    ----------
    frame : pandas.DataFrame
        Rows with the study's numeric columns as floats.
    study : Study
    rows : numpy.ndarray
        Each row's number in its file, for messages.
    origin : Assembly
        Where each column came from, for messages.

    Raises
    ------
    DataError
    """
    spec = study.panel
    path = spec.file
    for col in study.numeric_columns():
        vals = frame[col].to_numpy(dtype=float)
        if _plain_range(vals):
            continue
        bad = np.flatnonzero(~np.isfinite(vals))
        if len(bad):
            raise DataError(f"Data file {path}: column '{col}'{origin.origin(col)} has "
                            f"infinite values at {rows_text(rows[bad])}.")
        size = np.abs(vals)
        bad = np.flatnonzero((size > MAX_MAGNITUDE) | ((size > 0) & (size < MIN_MAGNITUDE)))
        if len(bad):
            raise DataError(
                f"Data file {path}: column '{col}'{origin.origin(col)} has values of extreme "
                f"magnitude (e.g. {vals[bad[0]]:g}) at {rows_text(rows[bad])}; products and "
                "squares of such numbers overflow or vanish in double precision. Express the "
                "column in other units (e.g. thousands, or per unit) so that values lie "
                f"between {MIN_MAGNITUDE:g} and {MAX_MAGNITUDE:g}."
            )
    for role, col in (("price", spec.price), ("quantity", spec.quantity)):
        vals = frame[col].to_numpy()
        if len(vals) and vals.min() > 0:
            continue
        bad = np.flatnonzero(vals <= 0)
        if len(bad):
            raise DataError(
                f"Data file {path}: {role} column '{col}'{origin.origin(col)} must be positive, "
                f"but has {vals[bad[0]]:g} at {rows_text(rows[bad])}."
            )
    if spec.concentration:
        col = spec.concentration
        vals = frame[col].to_numpy()
        bad = np.flatnonzero((vals <= 0) | (vals > 1))
        if len(bad):
            raise DataError(
                f"Data file {path}: concentration column '{col}'{origin.origin(col)} must be a "
                f"Herfindahl index as a share in (0, 1], but has {vals[bad[0]]:g} at "
                f"{rows_text(rows[bad])} (divide an index on the 0-10,000 scale by 10,000)."
            )
    if spec.sellers:
        col = spec.sellers
        vals = frame[col].to_numpy()
        bad = np.flatnonzero((vals < 1) | (vals != np.round(vals)))
        if len(bad):
            raise DataError(
                f"Data file {path}: sellers column '{col}'{origin.origin(col)} must hold whole "
                f"numbers >= 1, but has {vals[bad[0]]:g} at {rows_text(rows[bad])}."
            )


def _plain_range(vals: np.ndarray) -> bool:
    """True when the smallest and largest value alone show every value is finite and of
    sensible magnitude (all of one sign); otherwise each value is checked."""
    if not len(vals):
        return True
    lo, hi = float(vals.min()), float(vals.max())  # NaN or infinity shows here
    if not (np.isfinite(lo) and np.isfinite(hi)):
        return False
    if lo > 0:
        return lo >= MIN_MAGNITUDE and hi <= MAX_MAGNITUDE
    if hi < 0:
        return -hi >= MIN_MAGNITUDE and -lo <= MAX_MAGNITUDE
    return False


def _gaps(market: np.ndarray, position: np.ndarray) -> int:
    """Missing cells inside each market's own first-to-last span.

    ``market`` and ``position`` are codes of rows sorted by market, then by
    position, without repeats; consecutive periods differ by one in ``position``.
    """
    n = len(market)
    starts = np.flatnonzero(np.r_[True, market[1:] != market[:-1]])
    ends = np.r_[starts[1:] - 1, n - 1]
    return int(np.sum(position[ends] - position[starts] + 1) - n)


def _user_table(full: pd.DataFrame, study: Study) -> pd.DataFrame:
    """The assembled table with the study's key names, every column read or made."""
    spec = study.panel
    keys = {spec.market, spec.period}
    out = pd.DataFrame(index=full.index)
    if spec.market:
        out[spec.market] = full[MARKET]
    out[spec.period] = full[PERIOD]
    for col in full.columns:
        if col not in keys and col not in (MARKET, PERIOD, TIME):
            out[col] = full[col]
    return out.reset_index(drop=True)


def load_panel(study: Study) -> Panel:
    """Assemble, load and validate the study's panel.

    Parameters
    ----------
    study : Study
        A validated study.

    Returns
    -------
    Panel
        The validated panel, its description and its assembly.

    Raises
    ------
    DataError
        For any problem with the files or their contents; the message names
        the file, the column and the rows.
    """
    asm = assemble(study)
    origin = asm.assembly
    cols = list(study.columns())
    full, rows, detail, kept = _missing(asm.frame, cols, study, asm.rows, origin)
    for col, n in asm.dropped_detail.items():
        detail[col] = detail.get(col, 0) + n
    dropped = asm.dropped_rows + len(asm.frame) - len(full)
    # keys as codes: markets in the order pandas sorts their labels, periods in calendar order
    m_codes, p_codes = asm.market_codes, asm.periods.codes
    if kept is not None:
        m_codes, p_codes = m_codes[kept], p_codes[kept]
    for col in study.numeric_columns():
        if full[col].dtype != np.float64:
            full[col] = full[col].astype(float)
    check_values(full, study, rows, origin)

    # market then period order; markets compared through sorted codes (labels sort alike)
    t = full[TIME].to_numpy()
    step_m, step_t = np.diff(m_codes), np.diff(t)
    if not np.all((step_m > 0) | ((step_m == 0) & (step_t > 0))):
        order = np.lexsort((t, m_codes))
        full = full.iloc[order].reset_index(drop=True)
        rows = rows[order]
        m_codes, p_codes = m_codes[order], p_codes[order]
    # a new frame (no copy of the data: pandas copies on write, and before pandas 3
    # selecting columns copies them)
    frame = full[[*cols, PERIOD, TIME, MARKET]].copy(deep=False)
    if frame[TIME].dtype != np.int64:
        frame[TIME] = frame[TIME].astype(np.int64)

    n_markets = int(np.count_nonzero(np.bincount(m_codes)))
    present = np.bincount(p_codes, minlength=len(asm.periods.t)) > 0
    seen = np.flatnonzero(present)  # distinct periods in the panel, in calendar order
    # gaps count calendar steps; between dates, steps among the dates present
    position = ((np.cumsum(present) - 1)[p_codes] if asm.kind == "date"
                else frame[TIME].to_numpy())
    desc = PanelDescription(
        rows=len(frame),
        markets=n_markets,
        periods=len(seen),
        first_period=str(asm.periods.labels[seen[0]]),
        last_period=str(asm.periods.labels[seen[-1]]),
        balanced=bool(len(frame) == n_markets * len(seen)),
        gaps=_gaps(m_codes, position),
        dropped_rows=int(dropped),
        dropped_detail=dict(sorted(detail.items())),
        period_kind=asm.kind,
        sha256=origin.sha256(),
    )
    assembly = replace(origin, table=_user_table(full, study))
    present_m = np.bincount(m_codes) > 0
    m_codes = ((np.cumsum(present_m) - 1)[m_codes] if not present_m.all()  # dense 0..G-1
               else np.array(m_codes, dtype=np.int64))
    m_codes.flags.writeable = False
    return Panel(frame=frame, description=desc, source_rows=rows, assembly=assembly,
                 coded=(frame, m_codes))


def describe_assembly(panel: Panel, first_rows: int = 5) -> str:
    """Sources, join coverage, derived variables and the first rows, for ``conduct check``.

    Parameters
    ----------
    panel : Panel
    first_rows : int
        Rows of the assembled panel to show.

    Returns
    -------
    str
        Lines aligned like the rest of ``conduct check`` (labels in 10 columns).
    """
    if panel.assembly is None:
        return ""
    return panel.assembly.text(first_rows=first_rows)


def write_panel(panel: Panel, path: str | Path, *, replace: bool = False) -> Path:
    """Save the assembled panel for inspection (``conduct check --write-panel FILE``).

    Parameters
    ----------
    panel : Panel
    path : str or Path
        ``.csv``, ``.parquet``, ``.xlsx`` or ``.dta``.
    replace : bool
        Overwrite an existing file.

    Returns
    -------
    Path
    """
    if panel.assembly is None:
        raise DataError("This panel carries no assembly to write.")
    return panel.assembly.write(path, replace=replace)


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
    parts: list[list[str]] = []
    for c in columns:
        v = f[c]
        if pd.api.types.is_float_dtype(v):
            parts.append([f"{x:.12g}" for x in v.to_numpy(dtype=float).tolist()])
        else:
            parts.append(v.astype(str).tolist())
    joined = (["\x1f".join(row) for row in zip(*parts, strict=True)] if parts
              else [""] * len(f))
    hashes = [hashlib.sha1(s.encode("utf-8")).hexdigest()[:16] for s in joined]
    return pd.DataFrame({"market": f[MARKET].to_numpy(), "period": f[PERIOD].to_numpy(),
                         "hash": hashes})
