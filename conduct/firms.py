"""Firm-level input: firm x market x period quantities aggregated to the industry.

From a table with one row per firm, market and period this module computes,
for each market-period, the industry quantity ``Q = sum_i q_i``, the number of
active sellers ``N = #{i : q_i > 0}``, the Herfindahl index of quantity shares
``H = sum_i (q_i / Q)^2`` (a share in (0, 1]; ``1/N`` for equal shares) and the
quantity-share-weighted mean ``sum_i (q_i / Q) x_i`` of any firm cost shifter
``x``.  A firm listed with quantity 0 is present but not active.  Missing
quantities are refused (write 0 for a firm that sold nothing); so are
duplicated (firm, market, period) rows.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from conduct.errors import DataError, suggest
from conduct.study_data import FirmSpec
from conduct.tableio import (
    file_rows,
    file_sha256,
    market_labels,
    parse_periods,
    read_table,
    rows_text,
    to_numeric,
)

__all__ = ["FirmTable", "aggregate_firms", "check_totals"]

WHAT = "Firm table"


@dataclass(frozen=True, slots=True)
class FirmTable:
    """The firm table aggregated to one row per market-period.

    Attributes
    ----------
    frame : pandas.DataFrame
        Columns ``market`` and ``period`` (normalised labels, ``market`` is
        ``"all"`` without markets), ``_total`` (the firms' total quantity) and the
        spec's output columns.
    kind : str
        Period kind of the file (``integer``, ``quarter``, ``month``, ``date``).
    rows : int
        Data rows in the file.
    firms : int
        Distinct firm identifiers.
    sha256 : str
        Hash of the file's bytes.
    zero_total : int
        Market-periods where every listed firm has quantity 0 (H is missing there).
    """

    frame: pd.DataFrame
    kind: str
    rows: int
    firms: int
    sha256: str
    zero_total: int


def _require(frame: pd.DataFrame, spec: FirmSpec) -> None:
    named = [("firms.firm", spec.firm), ("firms.quantity", spec.quantity),
             ("firms.period", spec.period), ("firms.market", spec.market)]
    named += [("firms.share_weighted", c) for c in spec.share_weighted]
    present = list(frame.columns)
    for key, col in named:
        if col is not None and col not in present:
            raise DataError(
                f"{WHAT} {spec.file}: column '{col}' ({key}) is not in the file"
                f"{suggest(col, present)}. Columns present: {', '.join(present[:25])}."
            )


def aggregate_firms(spec: FirmSpec) -> FirmTable:
    """Read the firm table and aggregate it to market-periods.

    Parameters
    ----------
    spec : FirmSpec

    Returns
    -------
    FirmTable

    Raises
    ------
    DataError
        For missing columns, missing or non-numeric values, negative quantities,
        unparseable periods or a (firm, market, period) that repeats.
    """
    raw = read_table(spec.file, spec.sheet, what=WHAT, sheet_key="firms.sheet")
    _require(raw, spec)
    rows = file_rows(len(raw), spec.file)
    keys = [c for c in (spec.firm, spec.market, spec.period) if c]
    numeric = [spec.quantity, *spec.share_weighted]
    for col in [*keys, *numeric]:
        miss = raw[col].isna().to_numpy()
        if miss.any():
            hint = (" Write 0 for a firm that sold nothing." if col == spec.quantity else "")
            raise DataError(f"{WHAT} {spec.file}: column '{col}' has missing values at "
                            f"{rows_text(rows[miss])}; firm rows cannot be dropped.{hint}")
    values = {c: to_numeric(raw, c, spec.file, rows, what=WHAT).to_numpy() for c in numeric}
    q = values[spec.quantity]
    bad = np.flatnonzero(~np.isfinite(q) | (q < 0))
    if len(bad):
        raise DataError(f"{WHAT} {spec.file}: quantity column '{spec.quantity}' must be zero "
                        f"or positive, but has {q[bad[0]]:g} at {rows_text(rows[bad])}.")
    for c in spec.share_weighted:
        nonfinite = np.flatnonzero(~np.isfinite(values[c]))
        if len(nonfinite):
            raise DataError(f"{WHAT} {spec.file}: column '{c}' has infinite values at "
                            f"{rows_text(rows[nonfinite])}.")
    period, _, kind = parse_periods(raw[spec.period], spec.period, spec.file, rows, what=WHAT)
    market = (market_labels(raw[spec.market]) if spec.market
              else np.full(len(raw), "all", dtype=object))
    firm = raw[spec.firm].astype(str).str.strip().to_numpy(dtype=object)
    long = pd.DataFrame({"firm": firm, "market": market, "period": period, "_q": q})
    dup = long.duplicated(["firm", "market", "period"], keep=False).to_numpy()
    if dup.any():
        i = int(np.flatnonzero(dup)[0])
        same = np.flatnonzero(dup & (firm == firm[i]) & (market == market[i])
                              & (period == period[i]))
        where = (f"market '{market[i]}', " if spec.market else "") + f"period '{period[i]}'"
        raise DataError(f"{WHAT} {spec.file}: firm '{firm[i]}' appears more than once in "
                        f"{where} ({rows_text(rows[same])}); each firm needs one row per "
                        "market and period.")
    for c in spec.share_weighted:
        long[f"_w_{c}"] = q * values[c]
    long["_active"] = (q > 0).astype(np.int64)
    long["_q2"] = q * q
    sums = long.groupby(["market", "period"], sort=True).sum(numeric_only=True)
    total = sums["_q"].to_numpy()
    positive = total > 0
    with np.errstate(invalid="ignore", divide="ignore"):
        hhi = np.where(positive, sums["_q2"].to_numpy() / total**2, np.nan)
        out = pd.DataFrame({"market": sums.index.get_level_values(0).to_numpy(dtype=object),
                            "period": sums.index.get_level_values(1).to_numpy(dtype=object),
                            "_total": total})
        if spec.total:
            out[spec.total] = total
        if spec.sellers:
            out[spec.sellers] = sums["_active"].to_numpy(dtype=float)
        if spec.concentration:
            out[spec.concentration] = hhi
        for c in spec.share_weighted:
            out[c] = np.where(positive, sums[f"_w_{c}"].to_numpy() / total, np.nan)
    return FirmTable(frame=out, kind=kind, rows=len(raw), firms=int(pd.unique(firm).size),
                     sha256=file_sha256(spec.file), zero_total=int((~positive).sum()))


def check_totals(total: np.ndarray, given: np.ndarray, spec: FirmSpec,
                 labels: np.ndarray) -> float | None:
    """Compare the firms' total quantity with an industry column, row by row.

    Parameters
    ----------
    total : numpy.ndarray
        Sum of firm quantities per main row, shape (n,); NaN without firm data.
    given : numpy.ndarray
        The industry column ``spec.check_total``, shape (n,).
    spec : FirmSpec
    labels : numpy.ndarray
        ``market period`` text per row, shape (n,), for messages.

    Returns
    -------
    float or None
        The largest relative gap ``|total - given| / |given|`` over rows where
        both are known (None when there is no such row).

    Raises
    ------
    DataError
        When a gap exceeds ``spec.tolerance``, naming the market-periods.
    """
    both = np.isfinite(total) & np.isfinite(given)
    if not both.any():
        return None
    with np.errstate(invalid="ignore", divide="ignore"):
        gap = np.where(given != 0, np.abs(total - given) / np.abs(given),
                       np.where(total == given, 0.0, np.inf))
    gap = np.where(both, gap, 0.0)
    bad = np.flatnonzero(gap > spec.tolerance)
    if len(bad):
        shown = "; ".join(f"{labels[i]}: firms sum to {total[i]:.10g}, '{spec.check_total}' "
                          f"is {given[i]:.10g}" for i in bad[:3])
        more = f" and {len(bad) - 3} more" if len(bad) > 3 else ""
        raise DataError(
            f"{WHAT} {spec.file} does not add up to the industry column "
            f"'{spec.check_total}' (firms.check_total) in {len(bad)} market-period(s) "
            f"({shown}{more}); the relative gap allowed is firms.tolerance = "
            f"{spec.tolerance:g}. A firm may be missing from the table, or the two sources "
            "may measure different things."
        )
    return float(gap[both].max())
