"""What assembling the panel did: sources, their hashes, join coverage, derived variables.

An :class:`Assembly` is attached to every validated panel.  It prints itself
for ``conduct check`` (:meth:`Assembly.text`), writes the assembled table for
inspection (:meth:`Assembly.write`), and gives the JSON documents a run records
(:meth:`Assembly.sources_document`, :meth:`Assembly.derived_document`), so a
rerun can say which source changed (:func:`source_changes`).
"""

from __future__ import annotations

import hashlib
from collections.abc import Mapping
from dataclasses import dataclass
from pathlib import Path
from typing import Any, Literal

import pandas as pd

from conduct.derive_ops import DerivedRecord
from conduct.errors import ConductError

__all__ = ["WRITE_SUFFIXES", "Assembly", "SourceRecord", "source_changes",
           "source_changes_line"]

WRITE_SUFFIXES = (".csv", ".parquet", ".xlsx", ".dta")
_PAD = " " * 10


@dataclass(frozen=True, slots=True)
class SourceRecord:
    """One data file of the study and how it joined.

    Attributes
    ----------
    name : str
        ``panel`` for the main table, ``firms`` for the firm table, else the
        source's name.
    role : {"main", "join", "firms"}
    file : Path
    sha256 : str
        Hash of the file's bytes.
    rows : int
        Data rows in the file.
    on : tuple of str
        Join keys (empty for the main table).
    columns : tuple of str
        Columns taken from it (made columns for the firm table).
    matched, unmatched : int
        Main rows that found a row in it, and main rows left without a value.
    unused : int
        Rows (market-periods for the firm table) that matched no main row.
    """

    name: str
    role: Literal["main", "join", "firms"]
    file: Path
    sha256: str
    rows: int
    on: tuple[str, ...]
    columns: tuple[str, ...]
    matched: int
    unmatched: int
    unused: int

    def coverage(self) -> str:
        """``joined by period: 1728 of 1728 main rows matched, 0 rows unused``."""
        unit = "market-periods" if self.role == "firms" else "rows"
        total = self.matched + self.unmatched
        return (f"joined by {' and '.join(self.on)}: {self.matched} of {total} main rows "
                f"matched, {self.unused} {unit} unused")


@dataclass(frozen=True, slots=True)
class Assembly:
    """Sources, coverage and derived variables of a panel.

    Attributes
    ----------
    sources : tuple of SourceRecord
        The main table first, then each source in study-file order, then firms.
    derived : tuple of DerivedRecord
    origins : dict of str to str
        Column -> where it comes from, for columns not in the main table.
    firms_note : str or None
        Firms counted and the consistency check, when there is a firm table.
    table : pandas.DataFrame or None
        The assembled panel as validated (rows kept, sorted by market and period):
        market and period labels under the study's names, then every column read
        or made.  Set by :func:`conduct.panel.load_panel`.
    """

    sources: tuple[SourceRecord, ...]
    derived: tuple[DerivedRecord, ...]
    origins: dict[str, str]
    firms_note: str | None = None
    table: pd.DataFrame | None = None

    def sha256(self) -> str:
        """The main file's hash alone, or one hash over every source's name and hash."""
        if len(self.sources) == 1:
            return self.sources[0].sha256
        text = "".join(f"{s.name}\t{s.sha256}\n" for s in self.sources)
        return hashlib.sha256(text.encode("utf-8")).hexdigest()

    def origin(self, column: str) -> str:
        """`` (from source ...)`` for messages about a column, or ``""`` for main columns."""
        text = self.origins.get(column)
        return f" ({text})" if text else ""

    def text(self, first_rows: int = 5, width: int = 100) -> str:
        """Lines for ``conduct check``: sources, coverage, derived variables, first rows.

        Parameters
        ----------
        first_rows : int
            Rows of the assembled table to show (0: none).
        width : int
            Line width of the table.

        Returns
        -------
        str
        """
        lines: list[str] = []
        wide = max(len(s.name) for s in self.sources)
        for i, s in enumerate(self.sources):
            head = "sources   " if i == 0 else _PAD
            cols = ", ".join(s.columns) or "no column the study uses"
            lines.append(f"{head}{s.name:<{wide}}  {s.file.name} ({s.rows} rows, sha256 "
                         f"{s.sha256[:12]}): {cols}")
            if s.role != "main":
                lines.append(f"{_PAD}{'':<{wide}}  {s.coverage()}")
            if s.role == "firms" and self.firms_note:
                lines.append(f"{_PAD}{'':<{wide}}  {self.firms_note}")
        for i, d in enumerate(self.derived):
            head = "derived   " if i == 0 else _PAD
            miss = f" ({d.missing} missing)" if d.missing else ""
            lines.append(f"{head}{d.name} = {d.definition}{miss}")
        if first_rows and self.table is not None:
            lines.append(f"first rows of the assembled panel ({len(self.table)} rows):")
            shown = self.table.head(first_rows).to_string(index=False, line_width=width)
            lines += [f"  {line}" for line in shown.splitlines()]
        return "\n".join(lines)

    def sources_document(self) -> dict[str, dict[str, Any]]:
        """Source name -> file, sha256, rows, role, keys, columns and coverage (for JSON)."""
        return {
            s.name: {"file": s.file.name, "sha256": s.sha256, "rows": s.rows, "role": s.role,
                     "on": list(s.on), "columns": list(s.columns), "matched_rows": s.matched,
                     "unmatched_rows": s.unmatched, "unused_rows": s.unused}
            for s in self.sources
        }

    def derived_document(self) -> dict[str, dict[str, Any]]:
        """Derived name -> definition and missing count (for JSON)."""
        return {d.name: {"definition": d.definition, "missing": d.missing}
                for d in self.derived}

    def write(self, path: str | Path, *, replace: bool = False) -> Path:
        """Write the assembled panel (CSV, Parquet, Excel or Stata by suffix).

        Parameters
        ----------
        path : str or Path
        replace : bool
            Overwrite an existing file.

        Returns
        -------
        Path
            The file written.

        Raises
        ------
        ConductError
            For an unknown suffix or an existing file without ``replace``.
        """
        target = Path(path)
        suffix = target.suffix.lower()
        if suffix not in WRITE_SUFFIXES:
            raise ConductError(f"Cannot write the panel to {target}: use a file ending in "
                               f"{', '.join(WRITE_SUFFIXES)}.")
        if target.exists() and not replace:
            raise ConductError(f"{target} already exists; conduct never overwrites files you "
                               "have. Choose another name.")
        if self.table is None:
            raise ConductError("The panel has not been validated yet; nothing to write.")
        table = self.table
        if suffix == ".csv":
            table.to_csv(target, index=False, lineterminator="\n")
        elif suffix == ".parquet":
            table.to_parquet(target, index=False)
        elif suffix == ".xlsx":
            table.to_excel(target, index=False, sheet_name="panel")
        else:
            table.to_stata(target, write_index=False)
        return target


def source_changes(current: Mapping[str, Any],
                   previous: Mapping[str, Any] | None) -> dict[str, list[str]] | None:
    """Which sources changed between two runs' ``data.sources`` documents.

    Parameters
    ----------
    current : mapping
        ``summary["data"]["sources"]`` of this run.
    previous : mapping or None
        The same of the previous run (None: no previous run, or one recorded
        before sources were).

    Returns
    -------
    dict or None
        ``changed`` (same name, different hash), ``added`` and ``removed``
        source names, each sorted; None without a previous document.
    """
    if previous is None:
        return None
    changed = sorted(n for n in current if n in previous
                     and current[n].get("sha256") != previous[n].get("sha256"))
    return {"changed": changed, "added": sorted(set(current) - set(previous)),
            "removed": sorted(set(previous) - set(current))}


def source_changes_line(changes: Mapping[str, list[str]] | None) -> str:
    """One line for the terminal, e.g. ``sources changed: national; added: costs``.

    Parameters
    ----------
    changes : mapping or None
        What :func:`source_changes` returned.

    Returns
    -------
    str
        ``""`` without a comparison, ``no source changed`` when nothing did.
    """
    if changes is None:
        return ""
    parts = [f"{key}: {', '.join(changes[key])}" for key in ("changed", "added", "removed")
             if changes.get(key)]
    return "sources " + "; ".join(parts) if parts else "no source changed"
