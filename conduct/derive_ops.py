"""Derived variables: the fixed set of operations of ``[derive]``, on arrays.

Each operation takes float arrays aligned with the rows of the assembled panel
(one row per market and period) and returns a new float array; missing inputs
give missing outputs.  Shifts in time (``lag``, ``lead``, ``diff``) look up the
same market ``k`` steps away on the panel's own calendar (consecutive quarters,
months or integers; for date periods, the k-th distinct date of the panel
before or after), so a lag past the start of a market's series, or across a
gap, is missing and then follows the study's missing-value rule.  Nothing is
evaluated as code: the operation name picks one of the functions below.
"""

from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from conduct.errors import DataError
from conduct.study_data import DerivedSpec
from conduct.tableio import rows_text

__all__ = ["Calendar", "DerivedRecord", "apply_derived"]


@dataclass(frozen=True, slots=True)
class Calendar:
    """Where each row sits: market, period label and position on the panel's calendar.

    Attributes
    ----------
    market : numpy.ndarray
        Market labels (object array), shape (n,).
    period : numpy.ndarray
        Normalised period labels (``2019Q3``, ``2019-07``, ``2019-07-01``, ``12``), shape (n,).
    time : numpy.ndarray
        Integer calendar positions, shape (n,); consecutive periods differ by 1.
    kind : str
        ``integer``, ``quarter``, ``month`` or ``date``.
    rows : numpy.ndarray
        Row numbers in the main data file, shape (n,), for messages.
    file : Path
        The main data file, for messages.
    """

    market: np.ndarray
    period: np.ndarray
    time: np.ndarray
    kind: str
    rows: np.ndarray
    file: Path


@dataclass(frozen=True, slots=True)
class DerivedRecord:
    """What one derived variable became.

    Attributes
    ----------
    name : str
    definition : str
        E.g. ``lag(diesel, 1)``.
    missing : int
        Rows where it is missing (missing inputs, or shifts past a series' ends).
    """

    name: str
    definition: str
    missing: int


def _fail(spec: DerivedSpec, cal: Calendar, message: str) -> DataError:
    return DataError(f"Derived variable '{spec.name}' = {spec.describe()} (study key "
                     f"derive.{spec.name}), rows of {cal.file}: {message}")


def _shift(x: np.ndarray, cal: Calendar, k: int) -> np.ndarray:
    """Value of ``x`` in the same market ``k`` periods earlier (k < 0: later)."""
    here = pd.MultiIndex.from_arrays([cal.market, cal.time])
    there = pd.MultiIndex.from_arrays([cal.market, cal.time - k])
    pos = here.get_indexer(there)
    out = np.full(x.shape, np.nan)
    found = pos >= 0
    out[found] = x[pos[found]]
    return out


def _ratio(spec: DerivedSpec, xs: list[np.ndarray], cal: Calendar) -> np.ndarray:
    num, den = xs
    zero = np.flatnonzero(den == 0)
    if len(zero):
        raise _fail(spec, cal, f"the denominator '{spec.of[1]}' is zero at "
                               f"{rows_text(cal.rows[zero])}.")
    return num / den * spec.times


def _log(spec: DerivedSpec, xs: list[np.ndarray], cal: Calendar) -> np.ndarray:
    (x,) = xs
    bad = np.flatnonzero(x <= 0)
    if len(bad):
        raise _fail(spec, cal, f"the log needs positive values, but '{spec.of[0]}' is "
                               f"{x[bad[0]]:g} at {rows_text(cal.rows[bad])}.")
    with np.errstate(invalid="ignore"):
        return np.log(x)


def _lag(spec: DerivedSpec, xs: list[np.ndarray], cal: Calendar) -> np.ndarray:
    return _shift(xs[0], cal, spec.k)


def _lead(spec: DerivedSpec, xs: list[np.ndarray], cal: Calendar) -> np.ndarray:
    return _shift(xs[0], cal, -spec.k)


def _diff(spec: DerivedSpec, xs: list[np.ndarray], cal: Calendar) -> np.ndarray:
    return xs[0] - _shift(xs[0], cal, spec.k)


def _product(spec: DerivedSpec, xs: list[np.ndarray], cal: Calendar) -> np.ndarray:
    out = np.ones_like(xs[0])
    for x in xs:
        out = out * x
    return out


def _scale(spec: DerivedSpec, xs: list[np.ndarray], cal: Calendar) -> np.ndarray:
    return xs[0] * spec.times


def _season(spec: DerivedSpec, xs: list[np.ndarray], cal: Calendar) -> np.ndarray:
    unit = spec.unit
    if cal.kind == "integer":
        raise _fail(spec, cal, "the panel's periods are plain integers, which carry no "
                               "quarter or month; write periods as 2019Q3, 2019-07 or dates.")
    if cal.kind == "date" and unit is None:
        raise _fail(spec, cal, 'the panel has date periods: say unit = "quarter" or '
                               'unit = "month".')
    if cal.kind == "quarter":
        if unit == "month":
            raise _fail(spec, cal, 'the panel has quarterly periods, which carry no month; '
                                   'use unit = "quarter".')
        unit, value = "quarter", cal.time % 4 + 1
    else:
        month = (cal.time % 12 + 1 if cal.kind == "month"
                 else np.asarray([int(str(p)[5:7]) for p in cal.period], dtype=np.int64))
        unit = unit or "month"
        value = (month - 1) // 3 + 1 if unit == "quarter" else month
    top = 4 if unit == "quarter" else 12
    assert spec.at is not None
    if spec.at > top:
        raise _fail(spec, cal, f"at = {spec.at} is not a {unit} (1-{top}).")
    return (value == spec.at).astype(float)


_FUNCTIONS: dict[str, Callable[[DerivedSpec, list[np.ndarray], Calendar], np.ndarray]] = {
    "ratio": _ratio, "log": _log, "lag": _lag, "lead": _lead, "diff": _diff,
    "product": _product, "scale": _scale, "season": _season,
}


def apply_derived(columns: dict[str, np.ndarray], specs: tuple[DerivedSpec, ...],
                  cal: Calendar) -> tuple[dict[str, np.ndarray], tuple[DerivedRecord, ...]]:
    """Compute every derived variable, in order.

    Parameters
    ----------
    columns : dict of str to numpy.ndarray
        Numeric input columns, each of shape (n,) and aligned with ``cal``.
    specs : tuple of DerivedSpec
        In dependency order (as :func:`conduct.study_data.derive_order` returns them).
    cal : Calendar
        Market, period and calendar position of each row; (market, time) unique.

    Returns
    -------
    (dict, tuple of DerivedRecord)
        The new columns (float64, shape (n,)) and what each became.

    Raises
    ------
    DataError
        For an input that is not numeric, a zero denominator, the log of a
        non-positive value, or a seasonal indicator the periods cannot give.
    """
    made: dict[str, np.ndarray] = {}
    records: list[DerivedRecord] = []
    for spec in specs:
        xs = []
        for name in spec.of:
            x = made[name] if name in made else columns[name]
            if x.dtype.kind not in "fiub":
                raise _fail(spec, cal, f"input '{name}' is not numeric.")
            xs.append(x.astype(float))
        out = _FUNCTIONS[spec.op](spec, xs, cal)
        made[spec.name] = out
        records.append(DerivedRecord(spec.name, spec.describe(), int(np.isnan(out).sum())))
    return made, tuple(records)
