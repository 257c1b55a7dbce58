"""Assemble the panel from its sources before it is validated.

The main table (``[panel] file``) gives the rows: one per market and period.
Each ``[[sources]]`` table is left-joined onto it on its keys (market and
period, period only, or market only): a lookup table whose keys repeat is
refused, so main rows are never multiplied, and a main row that finds no match
keeps a missing value (then the study's missing-value rule applies).  A
``[firms]`` table is aggregated to market-periods (:mod:`conduct.firms`) and
joined the same way; ``[derive]`` variables are computed last
(:mod:`conduct.derive_ops`).  Every table's hash and join coverage is kept in
an :class:`Assembly`, which :mod:`conduct.panel` attaches to the validated
panel.
"""

from __future__ import annotations

import copy
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from conduct.coverage import Assembly, SourceRecord
from conduct.derive_ops import Calendar, DerivedRecord, apply_derived
from conduct.errors import DataError, suggest
from conduct.firms import aggregate_firms, check_totals
from conduct.study import Study
from conduct.study_data import SourceSpec
from conduct.tableio import (
    MARKET,
    PERIOD,
    TIME,
    PeriodCodes,
    file_rows,
    file_sha256,
    market_codes,
    market_labels,
    parse_periods,
    period_codes,
    read_table,
    rows_text,
    take_labels,
    to_numeric,
)

__all__ = ["Assembled", "assemble"]


@dataclass(frozen=True, slots=True)
class Assembled:
    """The joined table before the missing-value rule and value checks.

    Attributes
    ----------
    frame : pandas.DataFrame
        Every column read or made, plus ``_market``, ``_period`` and ``_t``;
        one row per main-table row with both keys, in file order.
    rows : numpy.ndarray
        Row number in the main file of each row of ``frame``.
    kind : str
        Period kind of the main table.
    dropped_rows : int
        Main rows without a market or period dropped under ``drop_missing``.
    dropped_detail : dict
        Column -> missing cells in those dropped rows.
    assembly : Assembly
        Sources, coverage and derived variables (``table`` not yet set).
    market_codes : numpy.ndarray
        (n,) int64 code of each row's ``_market``, in the order pandas sorts the labels.
    periods : PeriodCodes
        Each row's period among the distinct ones, in calendar order (``_t`` and
        ``_period`` of row i are ``periods.t[periods.codes[i]]`` and
        ``periods.labels[periods.codes[i]]``).
    """

    frame: pd.DataFrame
    rows: np.ndarray
    kind: str
    dropped_rows: int
    dropped_detail: dict[str, int]
    assembly: Assembly
    market_codes: np.ndarray
    periods: PeriodCodes


@dataclass
class _Source:
    """A lookup table read from disk, with what the study takes from it."""

    spec: SourceSpec
    frame: pd.DataFrame
    available: list[str]
    take: list[str] = field(default_factory=list)

    @property
    def what(self) -> str:
        return f"Source '{self.spec.name}' file"


def _read_sources(study: Study) -> list[_Source]:
    out = []
    for i, spec in enumerate(study.sources, 1):
        frame = read_table(spec.file, spec.sheet, what=f"Source '{spec.name}' file",
                           sheet_key=f"sources[{i}].sheet")
        present = list(frame.columns)
        for key in ("market", "period"):
            col = getattr(spec, key)
            if col is not None and col not in present:
                raise DataError(
                    f"Source '{spec.name}' file {spec.file}: key column '{col}' "
                    f"(sources[{i}].{key}) is not in the file{suggest(col, present)}. "
                    f"Columns present: {', '.join(present[:25])}."
                )
        for col in spec.columns:
            if col not in present:
                raise DataError(
                    f"Source '{spec.name}' file {spec.file}: column '{col}' listed in "
                    f"sources[{i}].columns is not in the file{suggest(col, present)}."
                )
        keys = {spec.market, spec.period}
        available = list(spec.columns) or [c for c in present if c not in keys]
        out.append(_Source(spec, frame, available))
    return out


def _locate(study: Study, main: pd.DataFrame, sources: list[_Source]) -> list[str]:
    """Assign each raw column to the one table holding it; return the main table's share."""
    spec = study.panel
    present = list(main.columns)
    main_take: list[str] = []
    made = study.made_columns()
    for name in made:
        holders = ([spec.file.name] if name in present else []) + [
            f"source '{s.spec.name}'" for s in sources if name in s.available]
        if holders:
            raise DataError(
                f"Study file {study.path.name} makes a column '{name}' ([firms] or [derive]), "
                f"but {' and '.join(holders)} already has a column of that name; give the "
                "made column another name (or, for a source, list the columns to take from it "
                "with columns = [...])."
            )
    for col in study.raw_columns():
        is_key = col in (spec.market, spec.period)
        in_main = col in present
        others = [] if is_key else [s for s in sources if col in s.available]
        if in_main and not others:
            main_take.append(col)
            continue
        if len(others) + in_main > 1:
            names = ([spec.file.name] if in_main else []) + [
                f"source '{s.spec.name}' ({s.spec.file.name})" for s in others]
            raise DataError(
                f"Column '{col}' is in {' and '.join(names)}; a column must come from one "
                "table. List the columns to take from a source with columns = [...] under "
                "its [[sources]] entry."
            )
        if others:
            others[0].take.append(col)
            continue
        if not sources or is_key:
            listing = ", ".join(present[:25]) + (" ..." if len(present) > 25 else "")
            raise DataError(
                f"Data file {spec.file}: column '{col}' named in the study file "
                f"{study.path.name} is not in the data{suggest(col, [*present, *made])}. "
                f"Columns present: {listing}."
            )
        pool = [*present, *(c for s in sources for c in s.available), *made]
        listing = "; ".join([f"{spec.file.name}: {', '.join(present[:15])}"] + [
            f"{s.spec.file.name}: {', '.join(s.available[:15])}" for s in sources])
        raise DataError(
            f"Column '{col}' named in the study file {study.path.name} is in none of the data "
            f"files{suggest(col, pool)}. Columns present: {listing}."
        )
    return main_take


def _numeric_set(study: Study) -> set[str]:
    numeric = set(study.numeric_columns()) | {c for d in study.derived for c in d.of}
    if study.firms is not None and study.firms.check_total:
        numeric.add(study.firms.check_total)
    return numeric & set(study.raw_columns())


def _main_table(study: Study, main: pd.DataFrame, take: list[str], numeric: set[str]
                ) -> tuple[pd.DataFrame, np.ndarray, str, int, dict[str, int], _Keys]:
    spec = study.panel
    path = spec.file
    rows = file_rows(len(main), path)
    # the columns taken, numeric ones converted; the frame is built once at the end from
    # these arrays without a copy.  When some columns are not taken, pandas copies the
    # others out of main's blocks, so that main's memory can be freed.
    taken = main if set(take) == set(main.columns) else main[take]
    data = {col: to_numeric(taken, col, path, rows) if col in numeric else taken[col]
            for col in take}
    keys = [c for c in (spec.market, spec.period) if c]
    key_miss = {c: data[c].isna().to_numpy() for c in keys}
    kmiss = np.logical_or.reduce([key_miss[c] for c in keys])
    detail: dict[str, int] = {}
    if kmiss.any():
        if not spec.drop_missing:
            col = next(c for c in keys if key_miss[c].any())
            raise DataError(
                f"Data file {path}: column '{col}' has missing values at "
                f"{rows_text(rows[key_miss[col]])}. Fill them, or set "
                "drop_missing = true under [panel] to drop such rows (every dropped row is "
                "counted in the output)."
            )
        for col in (c for c in study.columns() if c in take):
            n = int(np.count_nonzero(data[col].isna().to_numpy()[kmiss]))
            if n:
                detail[col] = n
        keep = ~kmiss
        data = {col: values[keep].reset_index(drop=True) for col, values in data.items()}
        rows = rows[keep]
        if len(rows) == 0:
            raise DataError(f"Data file {path}: every row has a missing value; nothing is left.")
    periods = period_codes(data[spec.period], spec.period, path, rows)
    if spec.market:
        m_codes, m_labels = market_codes(data[spec.market], rows)
    else:
        m_codes = np.zeros(len(rows), dtype=np.int64)
        m_labels = np.asarray(["all"], dtype=object)
    coded = _Keys(market=m_codes, market_labels=m_labels, periods=periods)
    _refuse_duplicates(coded, rows, study)
    # Series share their data without a copy; pandas copies it before any write
    columns: dict[str, Any] = dict(data)
    columns[PERIOD] = take_labels(periods.labels, periods.codes)
    columns[TIME] = periods.t[periods.codes]
    columns[MARKET] = take_labels(m_labels, m_codes)
    frame = pd.DataFrame(columns, copy=False)
    frame.attrs = copy.deepcopy(taken.attrs)  # as a copy of main[take] keeps them
    return frame, rows, periods.kind, int(kmiss.sum()), detail, coded


@dataclass(frozen=True, slots=True)
class _Keys:
    """The main table's keys as codes, one entry per row kept.

    ``market`` indexes ``market_labels`` (sorted as pandas sorts the labels);
    ``periods.codes`` indexes the distinct periods in calendar order.
    """

    market: np.ndarray
    market_labels: np.ndarray
    periods: PeriodCodes


def _refuse_duplicates(keys: _Keys, rows: np.ndarray, study: Study) -> None:
    """Refuse a (market, period) that repeats, comparing codes (one per label, one per _t)."""
    spec = study.panel
    n_periods = len(keys.periods.t)
    pair = keys.market * n_periods + keys.periods.codes
    cells = len(keys.market_labels) * n_periods
    if len(pair) > 1 and np.all(pair[1:] > pair[:-1]):  # grid order: nothing repeats
        return
    if cells <= 4 * len(pair) + 1024:
        counts = np.bincount(pair, minlength=cells)
        if counts.max(initial=0) <= 1:
            return
        dup = counts[pair] > 1
    else:
        dup = pd.Series(pair).duplicated(keep=False).to_numpy()
        if not dup.any():
            return
    i = int(np.flatnonzero(dup)[0])
    first = np.flatnonzero(pair == pair[i])
    where = (f"market '{keys.market_labels[keys.market[i]]}', " if spec.market else "") + \
        f"period '{keys.periods.labels[keys.periods.codes[i]]}'"
    what = "(market, period) pair" if spec.market else "period"
    hint = "" if spec.market else (
        " Several markets in one file need panel.market to name the market column."
    )
    raise DataError(
        f"Data file {spec.file}: each {what} must appear once, but {where} repeats "
        f"({rows_text(rows[first])}).{hint}"
    )


def _key_index(keys: list[np.ndarray]) -> pd.MultiIndex:
    return pd.MultiIndex.from_arrays(keys)


def _join_source(frame: pd.DataFrame, src: _Source, kind: str, numeric: set[str]
                 ) -> tuple[dict[str, np.ndarray], SourceRecord]:
    spec, raw, what = src.spec, src.frame, src.what
    rows = file_rows(len(raw), spec.file)
    key_cols = [c for c in (spec.market, spec.period) if c is not None]
    for col in key_cols:
        miss = raw[col].isna().to_numpy()
        if miss.any():
            raise DataError(f"{what} {spec.file}: key column '{col}' has missing values at "
                            f"{rows_text(rows[miss])}; every row of a joined table needs its "
                            "keys.")
    right: list[np.ndarray] = []
    left: list[np.ndarray] = []
    shown: list[str] = []
    if spec.market is not None:
        right.append(market_labels(raw[spec.market]))
        left.append(frame[MARKET].to_numpy())
    if spec.period is not None:
        labels, _, src_kind = parse_periods(raw[spec.period], spec.period, spec.file, rows,
                                            what=what)
        if src_kind != kind:
            raise DataError(
                f"{what} {spec.file}: period column '{spec.period}' holds {src_kind} periods, "
                f"but the panel's periods are {kind}s; write both the same way to join them."
            )
        right.append(labels)
        left.append(frame[PERIOD].to_numpy())
    index = _key_index(right)
    dup = index.duplicated(keep=False)
    if dup.any():
        i = int(np.flatnonzero(dup)[0])
        same = np.flatnonzero(dup & np.all([r == r[i] for r in right], axis=0))
        for key, r in zip(spec.on, right, strict=True):
            shown.append(f"{key} '{r[i]}'")
        raise DataError(
            f"{what} {spec.file}: the keys {' and '.join(spec.on)} must identify one row, but "
            f"{', '.join(shown)} repeats ({rows_text(rows[same])}). A repeated key would "
            "give a main row two values, so it is refused."
        )
    pos = index.get_indexer(_key_index(left))
    found = pos >= 0
    out: dict[str, np.ndarray] = {}
    for col in src.take:
        values = (to_numeric(raw, col, spec.file, rows, what=what) if col in numeric
                  else raw[col])
        out[col] = values.reset_index(drop=True).reindex(pos).to_numpy()
    record = SourceRecord(
        name=spec.name, role="join", file=spec.file, sha256=file_sha256(spec.file),
        rows=len(raw), on=spec.on, columns=tuple(src.take), matched=int(found.sum()),
        unmatched=int((~found).sum()), unused=len(raw) - int(np.unique(pos[found]).size),
    )
    return out, record


def _join_firms(frame: pd.DataFrame, study: Study, kind: str, columns: dict[str, np.ndarray]
                ) -> tuple[dict[str, np.ndarray], SourceRecord, str]:
    spec = study.firms
    assert spec is not None
    table = aggregate_firms(spec)
    if table.kind != kind:
        raise DataError(
            f"Firm table {spec.file}: period column '{spec.period}' holds {table.kind} periods, "
            f"but the panel's periods are {kind}s; write both the same way to join them."
        )
    agg = table.frame
    index = _key_index([agg["market"].to_numpy(), agg["period"].to_numpy()])
    pos = index.get_indexer(_key_index([frame[MARKET].to_numpy(), frame[PERIOD].to_numpy()]))
    found = pos >= 0
    out = {c: agg[c].reindex(pos).to_numpy(dtype=float) for c in spec.outputs()}
    note = f"{table.firms} firms"
    if spec.check_total:
        total = np.full(len(frame), np.nan)
        total[found] = agg["_total"].to_numpy()[pos[found]]
        labels = (frame[MARKET].astype(str) + " " + frame[PERIOD].astype(str)).to_numpy()
        gap = check_totals(total, columns[spec.check_total].astype(float), spec, labels)
        if gap is not None:
            note += (f"; total vs '{spec.check_total}': largest relative gap {gap:.2g} "
                     f"(tolerance {spec.tolerance:g})")
    if table.zero_total:
        note += f"; {table.zero_total} market-period(s) with no active seller"
    on = ("market", "period") if study.panel.market else ("period",)
    record = SourceRecord(
        name="firms", role="firms", file=spec.file, sha256=table.sha256, rows=table.rows,
        on=on, columns=spec.outputs(), matched=int(found.sum()),
        unmatched=int((~found).sum()), unused=len(agg) - int(np.unique(pos[found]).size),
    )
    return out, record, note


def _read_and_hash(path: Path, sheet: str | None, csv_options: dict[str, str]
                   ) -> tuple[pd.DataFrame, str]:
    """The main table and the SHA-256 of its file, the hash taken while the table is parsed.

    Both release the interpreter lock for most of their work.  The outcome is
    that of reading and then hashing: a read error is raised as it is (the hash
    is then left to finish on its own), a hashing error after a good read.
    """
    pool = ThreadPoolExecutor(max_workers=1, thread_name_prefix="conduct-sha256")
    try:
        digest = pool.submit(file_sha256, path)
        main = read_table(path, sheet, csv_options=csv_options)
        return main, digest.result()
    finally:
        pool.shutdown(wait=False)


def assemble(study: Study) -> Assembled:
    """Read the main table and every source, join them, aggregate firms, derive variables.

    Parameters
    ----------
    study : Study

    Returns
    -------
    Assembled

    Raises
    ------
    DataError
        Naming the file, the column and the rows: a column in no table or in
        two, a repeated key in a joined table, periods of another kind, a firm
        table that does not add up, a derived variable that cannot be computed.
    """
    spec = study.panel
    main, main_sha = _read_and_hash(spec.file, spec.sheet, spec.csv_options())
    sources = _read_sources(study)
    main_take = _locate(study, main, sources)
    numeric = _numeric_set(study)
    frame, rows, kind, dropped, detail, coded = _main_table(study, main, main_take, numeric)
    keys = {spec.market, spec.period}
    records = [SourceRecord(
        name="panel", role="main", file=spec.file, sha256=main_sha, rows=len(main), on=(),
        columns=tuple(c for c in main_take if c not in keys), matched=len(frame), unmatched=0,
        unused=0,
    )]
    origins: dict[str, str] = {}
    joined: dict[str, np.ndarray] = {}
    for src in sources:
        cols, record = _join_source(frame, src, kind, numeric)
        joined.update(cols)
        records.append(record)
        for c in cols:
            origins[c] = (f"from source '{record.name}' ({record.file.name}), joined by "
                          f"{' and '.join(record.on)}; {record.unmatched} main row(s) found no "
                          "match there")
    for col, values in joined.items():
        frame[col] = values
    firms_note = None
    if study.firms is not None:
        present = {c: frame[c].to_numpy() for c in frame.columns}
        cols, record, firms_note = _join_firms(frame, study, kind, present)
        records.append(record)
        for col, values in cols.items():
            frame[col] = values
            origins[col] = (f"made by [firms] from {record.file.name}; {record.unmatched} main "
                            "row(s) have no firm rows")
    derived_records: tuple[DerivedRecord, ...] = ()
    if study.derived:
        cal = Calendar(market=frame[MARKET].to_numpy(), period=frame[PERIOD].to_numpy(),
                       time=frame[TIME].to_numpy(), kind=kind, rows=rows, file=spec.file)
        inputs = {c: frame[c].to_numpy() for c in {x for d in study.derived for x in d.of}
                  if c in frame.columns}
        made, derived_records = apply_derived(inputs, study.derived, cal)
        for d in study.derived:
            frame[d.name] = made[d.name]
            shift = d.op in ("lag", "lead", "diff")
            origins[d.name] = (f"derive.{d.name} = {d.describe()}; missing where an input is "
                               "missing" + (" or where the shifted period is not in the market's "
                                            "series" if shift else ""))
    assembly = Assembly(sources=tuple(records), derived=derived_records, origins=origins,
                        firms_note=firms_note)
    return Assembled(frame=frame, rows=rows, kind=kind, dropped_rows=dropped,
                     dropped_detail=detail, assembly=assembly, market_codes=coded.market,
                     periods=coded.periods)
