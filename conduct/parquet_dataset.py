"""A Parquet dataset partitioned by market: find its files, group them, read a group.

A study with ``partitioned = true`` under ``[panel]`` names a directory instead
of a file: a Parquet dataset such as pandas/pyarrow write with
``to_parquet(folder, partition_cols=[market])`` or dask with
``to_parquet(folder, partition_on=[market])`` (``region=M01/part.0.parquet``
folders, one or more files per market), or a flat folder of Parquet files each
holding whole markets.  :func:`discover` lists the files from their footers
alone (row counts, column names, the market of each file from its folder name
or its column statistics) and groups them so that every market lies inside one
group; :func:`read_part` reads one group of files and validates it with the
same rules, and the same messages naming file, column and rows, as the
in-memory path; :func:`dask_frame` makes a ``dask.dataframe`` with one
partition per group of markets.  Nothing here holds more than one group's rows.
"""

from __future__ import annotations

import re
from collections.abc import Callable, Sequence
from dataclasses import dataclass, replace
from pathlib import Path
from typing import Any
from urllib.parse import unquote

import numpy as np
import pandas as pd
import pyarrow.parquet as pq

from conduct.coverage import Assembly
from conduct.errors import DataError, suggest
from conduct.panel import check_values  # the in-memory path's value rules
from conduct.study import Study
from conduct.tableio import (
    MARKET,
    PERIOD,
    TIME,
    market_labels,
    parquet_files,
    parse_periods,
    rows_text,
    to_numeric,
)

__all__ = ["FILE", "KEEP", "KIND", "KINDS", "PARTITION_ROWS", "Dataset", "PartFile",
           "dask_frame", "discover", "meta_frame", "read_columns", "read_part"]

PARTITION_ROWS = 200_000  # rows read together at most (unless one market group is larger)
KINDS = ("integer", "quarter", "month", "date")  # period kinds, coded 0..3 in KIND
KIND = "_kind"  # period kind of the row's file, as a code into KINDS
FILE = "_file"  # position of the row's file in Dataset.files
KEEP = "_keep"  # False for rows dropped for missing values under drop_missing
_ROW = "_row"
_HIVE_NULL = "__HIVE_DEFAULT_PARTITION__"
_NO_ORIGIN = Assembly(sources=(), derived=(), origins={})


@dataclass(frozen=True, slots=True)
class PartFile:
    """One Parquet file of the dataset.

    Attributes
    ----------
    index : int
        Position in :attr:`Dataset.files`.
    path : str
        Absolute path.
    keys : tuple of (str, str or None)
        Folder keys (``region=M01``) decoded; None for a missing value.
    rows : int
        Rows, from the footer.
    markets : tuple of str
        Market labels the file holds.
    """

    index: int
    path: str
    keys: tuple[tuple[str, str | None], ...]
    rows: int
    markets: tuple[str, ...]


@dataclass(frozen=True, slots=True)
class Dataset:
    """The files of a market-partitioned Parquet dataset and how they are grouped.

    Attributes
    ----------
    root : Path
    files : tuple of PartFile
    parts : tuple of tuple of int
        File positions read together: each market lies in exactly one part.
    rows : int
        Rows over all files (footers), before any is dropped.
    layout : str
        ``folders`` (``market=value`` folders) or ``files`` (market column in the files).
    warnings : tuple of str
    """

    root: Path
    files: tuple[PartFile, ...]
    parts: tuple[tuple[int, ...], ...]
    rows: int
    layout: str
    warnings: tuple[str, ...] = ()


def _is_dir(path: Path) -> tuple[bool, bool]:
    try:
        return path.exists(), path.is_dir()
    except (OSError, ValueError) as exc:
        raise DataError(f"Data directory {path} cannot be opened: "
                        f"{getattr(exc, 'strerror', None) or exc}.") from None


def _unreadable(path: Path, exc: Exception) -> DataError:
    return DataError(f"Data file {path} could not be read as Parquet: "
                     f"{str(exc).rstrip('.')}.")


def _key_label(value: str) -> str:
    """A folder value as a market label: ``3.0`` is ``3``, as for a float column."""
    text = value.strip()
    return text.split(".")[0] if re.fullmatch(r"-?\d+\.0*", text) else text


def _hive_keys(path: Path, root: Path) -> tuple[tuple[str, str | None], ...]:
    keys = []
    for part in path.relative_to(root).parts[:-1]:
        if "=" in part:
            name, value = part.split("=", 1)
            text = unquote(value)
            keys.append((unquote(name), None if text == _HIVE_NULL else text))
    return tuple(keys)


def read_columns(study: Study) -> tuple[str, ...]:
    """Columns the partitioned path reads: market, period and the numeric columns."""
    spec = study.panel
    out: list[str] = []
    for c in (spec.market, spec.period, *study.numeric_columns()):
        if c and c not in out:
            out.append(c)
    return tuple(out)


def _file_markets(path: Path, meta: Any, market: str) -> tuple[str, ...]:
    """Market labels of a flat file: from column statistics when they give one value."""
    names = [meta.schema.column(j).path for j in range(meta.num_columns)]
    if market in names and meta.num_row_groups:
        j = names.index(market)
        values = set()
        for g in range(meta.num_row_groups):
            stats = meta.row_group(g).column(j).statistics
            if stats is None or not stats.has_min_max or stats.null_count:
                values = set()
                break
            values.update((stats.min, stats.max))
        if len(values) == 1:
            return tuple(market_labels(pd.Series(list(values))))
    try:
        col = pq.read_table(path, columns=[market]).column(0).to_pandas().dropna()
    except Exception as exc:  # pyarrow's many reader errors become one message
        raise DataError(f"Data file {path}: its market column '{market}' could not be read "
                        f"as Parquet: {exc}.") from None
    return tuple(sorted(set(market_labels(col.drop_duplicates().reset_index(drop=True)))))


def _footer(path: Path, keys: dict[str, str | None], study: Study) -> Any:
    """The file's Parquet metadata, after checking it has every column the study reads."""
    try:
        meta = pq.read_metadata(path)
        names = list(meta.schema.to_arrow_schema().names)
    except Exception as exc:  # pyarrow's many reader errors become one message
        raise _unreadable(path, exc) from None
    present = [*names, *keys]
    for col in read_columns(study):
        if col not in present:
            listing = ", ".join(present[:25]) + (" ..." if len(present) > 25 else "")
            raise DataError(
                f"Data file {path}: column '{col}' named in the study file {study.path.name} "
                f"is not in the data{suggest(col, present)}. Columns present: {listing}."
            )
    return meta


def discover(study: Study, rows_per_partition: int = PARTITION_ROWS) -> Dataset:
    """List a market-partitioned Parquet dataset and group its files by market.

    Parameters
    ----------
    study : Study
        With ``[panel] partitioned = true``; ``file`` is the dataset's directory.
    rows_per_partition : int
        Groups of markets are packed into parts of about this many rows (a
        market is never split, so a part can hold more).

    Returns
    -------
    Dataset

    Raises
    ------
    DataError
        When the directory is missing or holds no Parquet file, a file cannot be
        read, lacks a column the study names, or the folders split the data by
        another column than the market.
    """
    spec = study.panel
    root = spec.file
    market = spec.market
    exists, is_dir = _is_dir(root)
    if not exists:
        raise DataError(f"Data directory {root} does not exist (paths are relative to the "
                        "study file).")
    if not is_dir:
        raise DataError(
            f"Data file {root} is a file, but partitioned = true under [panel] asks for a "
            "directory holding a Parquet dataset partitioned by market; remove partitioned = "
            "true to read this file whole."
        )
    paths = parquet_files(root)
    if not paths:
        raise DataError(
            f"Data directory {root} holds no Parquet files (.parquet or .pq); partitioned = "
            "true needs a Parquet dataset partitioned by market, such as pandas writes with "
            f"to_parquet(folder, partition_cols=['{market}'])."
        )
    assert market is not None  # refused earlier (a time series has no markets to split)
    first_keys = [k for k, _ in _hive_keys(paths[0], root)]
    files = []
    for i, path in enumerate(paths):
        keys = dict(_hive_keys(path, root))
        if list(keys) != first_keys:
            raise DataError(
                f"Data directory {root}: file {path} lies in folders keyed by "
                f"{', '.join(keys) or 'nothing'}, but {paths[0]} in folders keyed by "
                f"{', '.join(first_keys) or 'nothing'}; every file must be partitioned the "
                "same way."
            )
        if keys and market not in keys:
            raise DataError(
                f"Data directory {root} is partitioned by {', '.join(keys)} (folders such as "
                f"{path.parent.name}), not by the market column '{market}'. Write it "
                f"partitioned by market, e.g. to_parquet(folder, partition_cols=['{market}'])."
            )
        meta = _footer(path, keys, study)
        if market in keys:
            value = keys[market]
            markets: tuple[str, ...] = () if value is None else (_key_label(value),)
        else:
            markets = _file_markets(path, meta, market)
        files.append(PartFile(i, str(path), tuple(keys.items()), int(meta.num_rows), markets))
    groups = _market_groups(files)
    total = sum(f.rows for f in files)
    if total == 0:
        raise DataError(f"Data directory {root}: its Parquet files hold no data rows.")
    warnings = []
    spread = [g for g in groups if len(g) > 1 and len({m for i in g for m in files[i].markets}) > 1]
    if spread:
        big = max(spread, key=lambda g: sum(files[i].rows for i in g))
        warnings.append(
            f"Markets are spread over several files in {root}: {len(big)} files holding "
            f"{len({m for i in big for m in files[i].markets})} markets had to be read together "
            f"({sum(files[i].rows for i in big)} rows). Memory stays low only when each file "
            "holds whole markets (write the dataset partitioned by market)."
        )
    parts: list[tuple[int, ...]] = []
    current: list[int] = []
    rows_now = 0
    for g in groups:
        current += g
        rows_now += sum(files[i].rows for i in g)
        if rows_now >= rows_per_partition:
            parts.append(tuple(current))
            current, rows_now = [], 0
    if current:
        parts.append(tuple(current))
    layout = "folders" if first_keys else "files"
    return Dataset(root, tuple(files), tuple(parts), total, layout, tuple(warnings))


def _market_groups(files: list[PartFile]) -> list[list[int]]:
    """Files joined when they share a market (union-find), ordered by their first market."""
    parent = list(range(len(files)))

    def find(i: int) -> int:
        while parent[i] != i:
            parent[i] = parent[parent[i]]
            i = parent[i]
        return i

    owner: dict[str, int] = {}
    for f in files:
        for m in f.markets:
            if m in owner:
                a, b = find(f.index), find(owner[m])
                parent[max(a, b)] = min(a, b)
            else:
                owner[m] = f.index
    groups: dict[int, list[int]] = {}
    for f in files:
        groups.setdefault(find(f.index), []).append(f.index)

    def first(g: list[int]) -> tuple[str, int]:
        labels = [m for i in g for m in files[i].markets]
        return (min(labels) if labels else "", g[0])

    return sorted(groups.values(), key=first)


def meta_frame(study: Study) -> pd.DataFrame:
    """An empty frame with the columns and types :func:`read_part` returns."""
    cols: dict[str, pd.Series] = {c: pd.Series(dtype=float) for c in study.numeric_columns()}
    cols.update({MARKET: pd.Series(dtype=object), PERIOD: pd.Series(dtype=object),
                 TIME: pd.Series(dtype=np.int64), KIND: pd.Series(dtype=np.int8),
                 FILE: pd.Series(dtype=np.int32), KEEP: pd.Series(dtype=bool)})
    return pd.DataFrame(cols)


def _by_value(values: pd.Series, parse: Callable[[pd.Series, np.ndarray], Any],
              rows: np.ndarray) -> tuple[Any, np.ndarray]:
    """``parse`` run on the distinct values only (a file repeats its periods and market).

    Returns what ``parse`` returns for the distinct values and each row's position
    among them.  When the distinct values fail, ``parse`` runs again on every row so
    that the message names every row, as the in-memory path does.
    """
    inv, uniq = pd.factorize(values.to_numpy(), use_na_sentinel=False)
    first = np.zeros(len(uniq), dtype=np.int64)
    first[inv[::-1]] = np.arange(len(inv))[::-1]
    try:
        return parse(pd.Series(uniq, name=values.name), rows[first]), inv
    except DataError:
        parse(values.reset_index(drop=True), rows)
        raise


def _read_file(pf: PartFile, study: Study) -> pd.DataFrame:
    spec = study.panel
    path = Path(pf.path)
    keys = dict(pf.keys)
    wanted = read_columns(study)
    try:
        frame = pq.read_table(path, columns=[c for c in wanted if c not in keys]).to_pandas()
    except Exception as exc:  # pyarrow's many reader errors become one message
        raise _unreadable(path, exc) from None
    frame = frame.reset_index(drop=True)
    for c in wanted:
        if c in keys:
            frame[c] = pd.Series([keys[c]] * len(frame), dtype=object)
    n = len(frame)
    rows = np.arange(1, n + 1, dtype=np.int64)
    numeric = study.numeric_columns()
    for c in numeric:
        frame[c] = to_numeric(frame, c, path, rows)
    miss = frame[list(wanted)].isna()
    keep = ~miss.any(axis=1).to_numpy()
    if not keep.all() and not spec.drop_missing:
        col = next(c for c in wanted if miss[c].any())
        raise DataError(
            f"Data file {path}: column '{col}' has missing values at "
            f"{rows_text(rows[miss[col].to_numpy()])}. Fill them, or set drop_missing = true "
            "under [panel] to drop such rows (every dropped row is counted in the output)."
        )
    kept = frame.loc[keep].reset_index(drop=True)
    out = pd.DataFrame({c: frame[c].to_numpy(dtype=float) for c in numeric})
    assert spec.market is not None
    out[MARKET] = frame[spec.market].astype(object).to_numpy()  # raw where dropped
    out[PERIOD] = frame[spec.period].astype(object).to_numpy()
    out[TIME] = np.zeros(n, dtype=np.int64)
    kind = 0
    if len(kept):
        (labels, t, kind_name), inv = _by_value(
            kept[spec.period], lambda v, r: parse_periods(v, spec.period, path, r), rows[keep])
        kind = KINDS.index(kind_name)
        markets, inv_m = _by_value(kept[spec.market], market_labels, rows[keep])
        out.loc[keep, MARKET] = markets[inv_m]
        out.loc[keep, PERIOD] = labels[inv]
        out.loc[keep, TIME] = t[inv]
        check_values(kept, replace(study, panel=replace(spec, file=path)), rows[keep],
                      _NO_ORIGIN)
    out[KIND] = np.full(n, kind, dtype=np.int8)
    out[FILE] = np.full(n, pf.index, dtype=np.int32)
    out[KEEP] = keep
    out[_ROW] = rows
    return out


def _refuse_duplicates(frame: pd.DataFrame, files: dict[int, PartFile]) -> None:
    kept = frame.loc[frame[KEEP]]
    dup = kept.duplicated([MARKET, PERIOD], keep=False).to_numpy()
    if not dup.any():
        return
    first = kept.iloc[int(np.flatnonzero(dup)[0])]
    same = kept.loc[(kept[MARKET] == first[MARKET]) & (kept[PERIOD] == first[PERIOD])]
    where = "; ".join(
        f"{rows_text(g[_ROW].to_numpy())} of {files[int(i)].path}"
        for i, g in same.groupby(FILE, sort=True)
    )
    raise DataError(
        f"Data file {files[int(first[FILE])].path}: each (market, period) pair must appear "
        f"once, but market '{first[MARKET]}', period '{first[PERIOD]}' repeats ({where})."
    )


def read_part(files: Sequence[PartFile], study: Study) -> pd.DataFrame:
    """Read and validate one group of files.

    Parameters
    ----------
    files : sequence of PartFile
        Files holding whole markets.
    study : Study

    Returns
    -------
    pandas.DataFrame
        The numeric columns as float64, ``_market``, ``_period``, ``_t`` (the period's
        position on its calendar; a rank within the file for dates), ``_kind`` (period
        kind code into :data:`KINDS`), ``_file`` and ``_keep`` (False for rows dropped
        under ``drop_missing``; their other columns are not validated).

    Raises
    ------
    DataError
        Naming the file, the column and the rows: text in a numeric column,
        missing values, periods that do not parse, non-positive prices or
        quantities, a concentration outside (0, 1], a repeated (market, period).
    """
    pieces = [_read_file(pf, study) for pf in files]
    if not pieces:
        return meta_frame(study)
    frame = pd.concat(pieces, ignore_index=True)
    _refuse_duplicates(frame, {pf.index: pf for pf in files})
    return frame.drop(columns=[_ROW])


def dask_frame(dataset: Dataset, study: Study) -> Any:
    """A ``dask.dataframe`` with one partition per part of the dataset.

    Parameters
    ----------
    dataset : Dataset
    study : Study

    Returns
    -------
    dask.dataframe.DataFrame
        Partitions as :func:`read_part` returns them, read lazily.
    """
    import dask.dataframe as dd

    groups = [tuple(dataset.files[i] for i in part) for part in dataset.parts]
    return dd.from_map(read_part, groups, study=study, meta=meta_frame(study),
                       enforce_metadata=False, label="conduct-read")
