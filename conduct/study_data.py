"""The data-assembly part of a study file: extra sources, firm-level input, derived variables.

Three optional top-level entries of the study file say how the panel is put
together before anything is estimated.  Nothing in them is evaluated as code:
each derived variable is one operation from a small fixed set with named
arguments.

.. code-block:: toml

    [[sources]]                 # any number of further tables, left-joined onto [panel]
    name = "national"           # optional; defaults to the file name without suffix
    file = "national.csv"       # .csv, .parquet, .dta or .xlsx (sheet = "...")
    on = ["period"]             # "market", "period" or both (default: both, or period
                                # alone when the panel has no market column)
    period = "quarter"          # key columns in this file (default: the panel's names)
    columns = ["ppi"]           # optional: take only these columns

    [firms]                     # firm x market x period quantities
    file = "firms.csv"
    firm = "seller"
    quantity = "tonnes"
    total = "tonnes_firms"      # new columns (names you choose): industry quantity,
    sellers = "sellers"         # active sellers (quantity > 0), Herfindahl index as a share
    concentration = "hhi"
    share_weighted = ["fuel"]   # firm cost shifters -> quantity-share-weighted means
    check_total = "tonnes"      # compare the firms' total with this industry column
    tolerance = 0.001           # relative gap allowed by check_total

    [derive]                    # new column = one operation on columns (or on the period)
    price = {op = "ratio", of = ["price_nominal", "ppi"], times = 100}
    diesel_lag = {op = "lag", of = "diesel", k = 1}
    winter = {op = "season", at = 1}

Operations: ``ratio`` (a / b, optional ``times``), ``log`` (natural log),
``lag`` / ``lead`` (k periods earlier / later in the same market), ``diff``
(a - lag k of a), ``product`` (two or more columns), ``scale`` (a x ``times``)
and ``season`` (1 when the period's quarter or month is ``at``, else 0).
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path
from typing import Any, Literal, get_args

from conduct.errors import StudyFileError
from conduct.schema import TableReader, resolve_path

__all__ = [
    "OPERATIONS",
    "DerivedSpec",
    "FirmSpec",
    "Operation",
    "SourceSpec",
    "check_made_names",
    "derive_order",
    "parse_derived",
    "parse_firms",
    "parse_sources",
]

Key = Literal["market", "period"]
Operation = Literal["ratio", "log", "lag", "lead", "diff", "product", "scale", "season"]
SeasonUnit = Literal["quarter", "month"]

#: Operation -> (fewest inputs, most inputs or None, option keys, what it computes).
OPERATIONS: dict[str, tuple[int, int | None, tuple[str, ...], str]] = {
    "ratio": (2, 2, ("times",), "first / second (x times): deflate, per capita"),
    "log": (1, 1, (), "natural log; values must be positive"),
    "lag": (1, 1, ("k",), "value k periods earlier in the same market"),
    "lead": (1, 1, ("k",), "value k periods later in the same market"),
    "diff": (1, 1, ("k",), "value minus its lag k"),
    "product": (2, None, (), "product of the columns"),
    "scale": (1, 1, ("times",), "column x times"),
    "season": (0, 0, ("at", "unit"), "1 when the period's quarter (or month) is at, else 0"),
}
_OPTION_KEYS = ("k", "times", "at", "unit")
RESERVED_SOURCE_NAMES = ("panel", "firms")


@dataclass(frozen=True, slots=True)
class SourceSpec:
    """A further table joined onto the main one (left join on its keys).

    Attributes
    ----------
    name : str
        How messages and ``summary.json`` name it.
    file : Path
        Absolute path of the file.
    on : tuple of {"market", "period"}
        Keys of the join.
    market, period : str or None
        Key column names in this file (None for a key not joined on).
    columns : tuple of str
        Columns to take; empty means any column the study uses.
    sheet : str or None
        Sheet name for Excel files.
    """

    name: str
    file: Path
    on: tuple[Key, ...]
    market: str | None
    period: str | None
    columns: tuple[str, ...] = ()
    sheet: str | None = None


@dataclass(frozen=True, slots=True)
class FirmSpec:
    """Firm x market x period quantities aggregated to the industry.

    Attributes
    ----------
    file : Path
    firm, quantity : str
        Firm identifier and firm quantity columns in the file.
    market, period : str or None
        Key columns in the file (``market`` None for one market's time series).
    total, sellers, concentration : str or None
        Names of the new industry columns: total quantity, number of active
        sellers (quantity > 0) and the Herfindahl index as a share.
    share_weighted : tuple of str
        Firm columns turned into quantity-share-weighted industry means
        (same names).
    check_total : str or None
        An industry quantity column to compare with the firms' total.
    tolerance : float
        Relative gap ``|total - check| / |check|`` allowed by ``check_total``.
    sheet : str or None
    """

    file: Path
    firm: str
    quantity: str
    market: str | None
    period: str
    total: str | None = None
    sellers: str | None = None
    concentration: str | None = None
    share_weighted: tuple[str, ...] = ()
    check_total: str | None = None
    tolerance: float = 1e-3
    sheet: str | None = None

    def outputs(self) -> tuple[str, ...]:
        """Names of the industry columns this table makes."""
        made = (self.total, self.sellers, self.concentration, *self.share_weighted)
        return tuple(c for c in made if c)


@dataclass(frozen=True, slots=True)
class DerivedSpec:
    """One derived variable: ``name = op(of...)`` with the op's options.

    Attributes
    ----------
    name : str
    op : Operation
    of : tuple of str
        Input columns (raw or derived), in order.
    k : int
        Periods for ``lag``, ``lead`` and ``diff``.
    times : float
        Multiplier for ``ratio`` and ``scale``.
    at : int or None
        Quarter (1-4) or month (1-12) for ``season``.
    unit : {"quarter", "month"} or None
        What ``at`` counts; None means the panel's own periods.
    """

    name: str
    op: Operation
    of: tuple[str, ...]
    k: int = 1
    times: float = 1.0
    at: int | None = None
    unit: SeasonUnit | None = None

    def describe(self) -> str:
        """The definition in words, e.g. ``ratio(price_nominal, ppi) x 100``."""
        args = ", ".join(self.of)
        if self.op in ("lag", "lead", "diff"):
            return f"{self.op}({args}, {self.k})"
        if self.op == "scale" or (self.op == "ratio" and self.times != 1.0):
            return f"{self.op}({args}) x {self.times:g}"
        if self.op == "season":
            return f"season({self.unit} {self.at})" if self.unit else f"season(at {self.at})"
        return f"{self.op}({args})"


# ----------------------------------------------------------------------------------------
# [[sources]]
# ----------------------------------------------------------------------------------------


def _data_file(r: TableReader, key: str, study_file: Path, suffixes: tuple[str, ...]) -> Path:
    raw = r.get(key, r.string)
    path = resolve_path(study_file.parent, raw, "file")
    if path.suffix.lower() not in suffixes:
        raise r.fail(key, f"names '{raw}', whose type '{path.suffix or '(none)'}' is not read; "
                          f"use one of {', '.join(suffixes)}.")
    return path


def parse_sources(value: Any, study_file: Path, panel_market: str | None,
                  panel_period: str, suffixes: tuple[str, ...]) -> tuple[SourceSpec, ...]:
    """Read the ``[[sources]]`` array of tables.

    Parameters
    ----------
    value : Any
        The TOML value of ``sources`` (a list of tables).
    study_file : Path
        For messages and relative paths.
    panel_market, panel_period : str or None
        The panel's key column names: the defaults for each source's keys.
    suffixes : tuple of str
        File types that can be read.

    Returns
    -------
    tuple of SourceSpec

    Raises
    ------
    StudyFileError
        For a malformed entry, a join on a market the panel lacks, or two
        sources with one name.
    """
    if isinstance(value, dict):
        value = [value]
    if not isinstance(value, list) or not all(isinstance(v, dict) for v in value):
        raise StudyFileError(f"Study file {study_file}: 'sources' must be an array of tables "
                             "([[sources]] with file = \"...\" under each).")
    out: list[SourceSpec] = []
    for i, table in enumerate(value, 1):
        r = TableReader(table, f"sources[{i}]", study_file)
        path = _data_file(r, "file", study_file, suffixes)
        default_on: tuple[str, ...] = ("market", "period") if panel_market else ("period",)
        on = r.get("on", r.choices(get_args(Key)), default_on)
        name = r.get("name", r.string, path.stem)
        market = r.get("market", r.opt_string, panel_market)
        period = r.get("period", r.opt_string, panel_period)
        columns = r.get("columns", r.strings, ())
        sheet = r.get("sheet", r.opt_string, None)
        r.finish()
        if not on:
            raise r.fail("on", 'is empty: join on "market", "period" or both.')
        if "market" in on and panel_market is None:
            raise r.fail("on", 'includes "market", but the panel has no market column '
                               "(panel.market is not set).")
        if "market" in on and market is None:
            raise r.fail("market", "is empty but the source is joined on market.")
        if "period" in on and period is None:
            raise r.fail("period", "is empty but the source is joined on period.")
        if name in RESERVED_SOURCE_NAMES:
            raise r.fail("name", f"'{name}' is reserved for the {name} table; choose another.")
        keys = {market if "market" in on else None, period if "period" in on else None}
        clash = [c for c in columns if c in keys]
        if clash:
            raise r.fail("columns", f"lists the key column {clash[0]!r}; keys are joined on, "
                                    "not taken.")
        out.append(SourceSpec(
            name=name, file=path, on=tuple(k for k in ("market", "period") if k in on),
            market=market if "market" in on else None,
            period=period if "period" in on else None, columns=columns, sheet=sheet,
        ))
    names = [s.name for s in out]
    dupes = sorted({n for n in names if names.count(n) > 1})
    if dupes:
        raise StudyFileError(f"Study file {study_file}: two [[sources]] are named "
                             f"'{dupes[0]}'; give each a distinct name = \"...\".")
    return tuple(out)


# ----------------------------------------------------------------------------------------
# [firms]
# ----------------------------------------------------------------------------------------


def parse_firms(table: dict[str, Any], study_file: Path, panel_market: str | None,
                panel_period: str, suffixes: tuple[str, ...]) -> FirmSpec:
    """Read the ``[firms]`` table.

    Parameters
    ----------
    table : dict
    study_file : Path
    panel_market, panel_period : str or None
        Defaults for the firm table's key columns.
    suffixes : tuple of str

    Returns
    -------
    FirmSpec

    Raises
    ------
    StudyFileError
        For a malformed table, no output column, or a negative tolerance.
    """
    r = TableReader(table, "firms", study_file)
    spec = FirmSpec(
        file=_data_file(r, "file", study_file, suffixes),
        firm=r.get("firm", r.string),
        quantity=r.get("quantity", r.string),
        market=r.get("market", r.opt_string, panel_market),
        period=r.get("period", r.string, panel_period),
        total=r.get("total", r.opt_string, None),
        sellers=r.get("sellers", r.opt_string, None),
        concentration=r.get("concentration", r.opt_string, None),
        share_weighted=r.get("share_weighted", r.strings, ()),
        check_total=r.get("check_total", r.opt_string, None),
        tolerance=r.get("tolerance", r.number, 1e-3),
        sheet=r.get("sheet", r.opt_string, None),
    )
    r.finish()
    if not spec.outputs():
        raise StudyFileError(
            f"Study file {study_file}: [firms] makes no column; name at least one of total, "
            "sellers, concentration or share_weighted."
        )
    if spec.tolerance < 0:
        raise r.fail("tolerance", f"must be zero or positive, got {spec.tolerance:g}.")
    if panel_market is None and spec.market is not None:
        raise r.fail("market", "is set, but the panel has no market column (panel.market).")
    if panel_market is not None and spec.market is None:
        raise r.fail("market", "is empty, but the panel has markets: name the firm table's "
                               "market column.")
    firm_cols = {spec.firm, spec.quantity, spec.period, spec.market}
    for c in spec.share_weighted:
        if c in firm_cols:
            raise r.fail("share_weighted", f"lists '{c}', a key or the quantity column.")
    if spec.check_total and spec.check_total in spec.outputs():
        raise r.fail("check_total", f"is '{spec.check_total}', a column [firms] makes itself; "
                                    "name an industry column of the panel.")
    return spec


# ----------------------------------------------------------------------------------------
# [derive]
# ----------------------------------------------------------------------------------------


def _inputs(r: TableReader, op: str) -> tuple[str, ...]:
    lo, hi, _, _ = OPERATIONS[op]
    if hi == 0:
        return ()

    def conv(value: Any, key: str) -> tuple[str, ...]:
        return (r.string(value, key),) if isinstance(value, str) else r.strings(value, key)

    of = r.get("of", conv)
    if len(of) < lo or (hi is not None and len(of) > hi):
        want = (f"exactly {lo}" if lo == hi else f"at least {lo}")
        raise r.fail("of", f"gives {len(of)} column(s), but '{op}' takes {want} "
                           f"({OPERATIONS[op][3]}).")
    return of


def _one(name: str, table: Any, study_file: Path) -> DerivedSpec:
    where = f"derive.{name}"
    if not isinstance(table, dict):
        raise StudyFileError(
            f"Study file {study_file}: '{where}' must be a table such as "
            f'{{op = "log", of = "price"}}, got {table!r}.'
        )
    if name.startswith("_") or not name.strip():
        raise StudyFileError(f"Study file {study_file}: derived variable '{name}' is not "
                             "allowed; names starting with '_' are reserved.")
    r = TableReader(table, where, study_file)
    op = r.get("op", r.choice(tuple(OPERATIONS)))
    of = _inputs(r, op)
    options = OPERATIONS[op][2]
    for key in _OPTION_KEYS:
        if key in table and key not in options:
            takers = [o for o, v in OPERATIONS.items() if key in v[2]]
            raise r.fail(key, f"does not apply to op '{op}' (it is an option of "
                              f"{', '.join(takers)}); options of '{op}': "
                              f"{', '.join(options) or 'none'}.")
    k = r.get("k", r.integer, 1) if "k" in options else 1
    times = 1.0
    if op == "scale":
        times = r.get("times", r.number)
    elif op == "ratio":
        times = r.get("times", r.number, 1.0)
    at = r.get("at", r.integer) if op == "season" else None
    unit = r.get("unit", r.choice(get_args(SeasonUnit)), None) if op == "season" else None
    r.finish()
    if k < 1:
        raise r.fail("k", f"must be a whole number of periods >= 1, got {k}.")
    if at is not None:
        top = 4 if unit == "quarter" else 12
        if not 1 <= at <= top:
            what = "a quarter 1-4" if top == 4 else "a quarter 1-4 or a month 1-12"
            raise r.fail("at", f"must be {what}, got {at}.")
    if name in of:
        raise r.fail("of", f"uses '{name}' itself.")
    return DerivedSpec(name=name, op=op, of=of, k=k, times=float(times), at=at, unit=unit)


def parse_derived(table: dict[str, Any], study_file: Path) -> tuple[DerivedSpec, ...]:
    """Read the ``[derive]`` table: one entry per new column.

    Parameters
    ----------
    table : dict
        New column name -> ``{op = ..., of = ..., options}``.
    study_file : Path

    Returns
    -------
    tuple of DerivedSpec
        In dependency order (inputs first); see :func:`derive_order`.

    Raises
    ------
    StudyFileError
        For an unknown operation (with a did-you-mean hint), a wrong number of
        inputs, an option the operation does not take, or a cycle.
    """
    specs = tuple(_one(str(name), t, study_file) for name, t in table.items())
    return derive_order(specs, study_file)


def derive_order(specs: tuple[DerivedSpec, ...], study_file: Path) -> tuple[DerivedSpec, ...]:
    """Order derived variables so each comes after the derived variables it uses.

    Parameters
    ----------
    specs : tuple of DerivedSpec
        In file order (kept where dependencies allow).
    study_file : Path

    Returns
    -------
    tuple of DerivedSpec

    Raises
    ------
    StudyFileError
        When the definitions form a cycle.
    """
    by_name = {s.name: s for s in specs}
    done: list[DerivedSpec] = []
    placed: set[str] = set()
    pending = list(specs)
    while pending:
        ready = [s for s in pending if all(c in placed or c not in by_name for c in s.of)]
        if not ready:
            cycle = " -> ".join(s.name for s in pending)
            raise StudyFileError(f"Study file {study_file}: derived variables {cycle} use each "
                                 "other in a cycle; one of them must start from data columns.")
        first = ready[0]
        done.append(first)
        placed.add(first.name)
        pending.remove(first)
    return tuple(done)


def check_made_names(made: list[tuple[str, str]], keys: dict[str, str],
                     study_file: Path) -> None:
    """Refuse a made column named twice or named like a panel key.

    Parameters
    ----------
    made : list of (name, where)
        Every column made by [firms] and [derive], with the key that makes it.
    keys : dict
        Panel key column -> its key (``panel.market``, ``panel.period``).
    study_file : Path

    Raises
    ------
    StudyFileError
    """
    seen: dict[str, str] = {}
    for name, where in made:
        if name in keys:
            raise StudyFileError(f"Study file {study_file}: {where} makes a column '{name}', "
                                 f"which is {keys[name]}; choose another name.")
        if name in seen:
            raise StudyFileError(f"Study file {study_file}: column '{name}' is made both by "
                                 f"{seen[name]} and by {where}; choose distinct names.")
        seen[name] = where

