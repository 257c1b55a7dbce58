"""The study file: TOML parsed into frozen, validated dataclasses.

A study is one panel plus one specification.  This module reads the TOML with
:mod:`tomllib`, checks every key (unknown keys are errors with a did-you-mean
suggestion; wrong types and missing required keys name the key and the file),
resolves paths relative to the study file, and returns a :class:`Study`.
Nothing in a study file is ever evaluated as code.
"""

from __future__ import annotations

import tomllib
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Literal, get_args

from conduct.errors import StudyFileError, suggest
from conduct.schema import TableReader, resolve_path, sub_table
from conduct.study_data import (
    DerivedSpec,
    FirmSpec,
    SourceSpec,
    check_made_names,
    parse_derived,
    parse_firms,
    parse_sources,
)

__all__ = [
    "Candidate",
    "DemandSpec",
    "InferenceSpec",
    "OutputSpec",
    "PanelSpec",
    "Study",
    "SupplySpec",
    "load_study",
    "parse_study",
]

Form = Literal["linear", "log"]
Estimator = Literal["2sls", "liml", "gmm"]
Errors = Literal["cluster", "robust", "homoskedastic", "hac"]
Effect = Literal["market", "period"]
BUILTIN_MODELS: dict[str, float | None] = {"competitive": 0.0, "cournot": None, "collusive": 1.0}
MAX_BOOTSTRAP = 100_000  # beyond this a run would take days; nothing gained in precision
MAX_HAC_LAGS = 10_000
DATA_SUFFIXES = (".csv", ".parquet", ".pq", ".dta", ".xlsx")


@dataclass(frozen=True, slots=True)
class PanelSpec:
    """Where the panel is and which columns mean what.

    Attributes
    ----------
    file : Path
        Absolute path of the data file.
    market, period, price, quantity : str or None
        Column names; ``market`` is None for one market's time series.
    sellers, concentration : str or None
        Optional columns: number of sellers N and Herfindahl index H in [0, 1].
    drop_missing : bool
        Drop rows with missing values in used columns (each counted) instead of refusing.
    sheet : str or None
        Sheet name for Excel files.
    delimiter, decimal, thousands : str or None
        How the main CSV file writes fields and numbers (e.g. ``";"``, ``","``, ``"."``
        for files written with European conventions); None is the plain reading.
    partitioned : bool
        ``file`` is a directory holding a Parquet dataset partitioned by market, estimated
        part by part (:mod:`conduct.partitioned`) instead of loaded whole.
    """

    file: Path
    period: str
    price: str
    quantity: str
    market: str | None = None
    sellers: str | None = None
    concentration: str | None = None
    drop_missing: bool = False
    sheet: str | None = None
    delimiter: str | None = None
    decimal: str | None = None
    thousands: str | None = None
    partitioned: bool = False

    def csv_options(self) -> dict[str, str]:
        """Keyword arguments for reading the main CSV file."""
        opts = {"sep": self.delimiter, "decimal": self.decimal, "thousands": self.thousands}
        return {k: v for k, v in opts.items() if v is not None}


@dataclass(frozen=True, slots=True)
class DemandSpec:
    """The demand equation and how to estimate it.

    ``cluster`` names the cluster dimensions for ``errors = "cluster"``: empty means
    by market; ``["market", "period"]`` clusters two ways; any other name is a column.
    The same covariance choice applies to every stage.
    """

    instruments: tuple[str, ...]
    form: Form = "linear"
    shifters: tuple[str, ...] = ()
    rotators: tuple[str, ...] = ()
    effects: tuple[Effect, ...] = ()
    estimator: Estimator = "2sls"
    errors: Errors = "cluster"
    hac_lags: int | None = None
    cluster: tuple[str, ...] = ()


@dataclass(frozen=True, slots=True)
class SupplySpec:
    """The supply relation P = MC + theta * Q*.

    Attributes
    ----------
    cost_shifters : tuple of str
    cost_slope : bool
        Marginal cost may rise with quantity.
    instruments : tuple of str
        Extra excluded instruments.
    regimes : str or None
        Column of known regimes: a theta per regime and a test of equality.
    groups : str or None
        Column grouping markets: a theta per group, tests with multiple-testing control.
    break_test : bool
        Search for one break in theta at an unknown date (sup-Wald).
    rolling_window : int
        Periods per rolling window for monitoring theta (0: off).
    instrument_sets : tuple of (str, tuple of str)
        Named alternative instrument sets for the menu test (``a*b`` for products).
    """

    cost_shifters: tuple[str, ...] = ()
    cost_slope: bool = True
    instruments: tuple[str, ...] = ()
    regimes: str | None = None
    groups: str | None = None
    break_test: bool = False
    rolling_window: int = 0
    instrument_sets: tuple[tuple[str, tuple[str, ...]], ...] = ()


@dataclass(frozen=True, slots=True)
class Candidate:
    """A candidate model of conduct.

    Attributes
    ----------
    name : str
        ``competitive``, ``cournot``, ``collusive`` or a user name.
    theta : float or None
        Fixed conduct parameter; None means the Cournot benchmark (H or 1/N).
    """

    name: str
    theta: float | None


@dataclass(frozen=True, slots=True)
class InferenceSpec:
    """Confidence level, bootstrap replications and seed."""

    level: float = 0.95
    bootstrap: int = 0
    seed: int = 1


@dataclass(frozen=True, slots=True)
class OutputSpec:
    """Where run folders go."""

    runs: Path = Path("runs")


@dataclass(frozen=True, slots=True)
class Study:
    """A whole study: panel, demand, optional supply, candidates, inference, output.

    ``sources``, ``firms`` and ``derived`` say how the panel is assembled from
    further tables (:mod:`conduct.study_data`); a column named anywhere in the
    specification may be one they make.
    """

    path: Path
    title: str
    panel: PanelSpec
    demand: DemandSpec
    supply: SupplySpec | None
    candidates: tuple[Candidate, ...]
    inference: InferenceSpec = field(default_factory=InferenceSpec)
    output: OutputSpec = field(default_factory=OutputSpec)
    text: str = ""
    sources: tuple[SourceSpec, ...] = ()
    firms: FirmSpec | None = None
    derived: tuple[DerivedSpec, ...] = ()

    def columns(self) -> tuple[str, ...]:
        """Every data column the study uses, in a stable order without repeats.

        A name may be one the panel assembly makes (``[firms]`` outputs,
        ``[derive]`` variables); :meth:`raw_columns` lists what is read from files.
        """
        names: list[str | None] = [
            self.panel.market,
            self.panel.period,
            self.panel.price,
            self.panel.quantity,
            self.panel.sellers,
            self.panel.concentration,
            *self.demand.shifters,
            *self.demand.rotators,
            *self.demand.instruments,
            *[c for c in self.demand.cluster if c not in ("market", "period")],
        ]
        if self.supply is not None:
            names += [*self.supply.cost_shifters, *self.supply.instruments, self.supply.regimes,
                      self.supply.groups]
            names += [part for _, cols in self.supply.instrument_sets for c in cols
                      for part in c.split("*")]
        out: list[str] = []
        for n in names:
            if n and n not in out:
                out.append(n)
        return tuple(out)

    def numeric_columns(self) -> tuple[str, ...]:
        """Columns that must hold numbers (everything except keys and regimes)."""
        keys = {self.panel.market, self.panel.period, *self.demand.cluster}
        if self.supply is not None:
            keys.update(c for c in (self.supply.regimes, self.supply.groups) if c)
        return tuple(c for c in self.columns() if c not in keys)

    def made_columns(self) -> tuple[str, ...]:
        """Columns made while assembling the panel: [firms] outputs, then [derive] names."""
        made = self.firms.outputs() if self.firms is not None else ()
        return (*made, *(d.name for d in self.derived))

    def raw_columns(self) -> tuple[str, ...]:
        """Columns read from the data files: used columns not made, inputs of made ones.

        The order is stable and without repeats: :meth:`columns` first, then the
        inputs of derived variables, then ``firms.check_total``.
        """
        made = set(self.made_columns())
        names = [*self.columns(), *(c for d in self.derived for c in d.of)]
        if self.firms is not None and self.firms.check_total:
            names.append(self.firms.check_total)
        out: list[str] = []
        for n in names:
            if n not in made and n not in out:
                out.append(n)
        return tuple(out)


def _panel(t: dict[str, Any], file: Path) -> PanelSpec:
    r = TableReader(t, "panel", file)
    raw_file = r.get("file", r.string)
    path = resolve_path(file.parent, raw_file, "panel.file")
    partitioned = r.get("partitioned", r.boolean, False)
    if not partitioned and path.suffix.lower() not in DATA_SUFFIXES:
        folder = (" It is a directory: for a Parquet dataset partitioned by market, set "
                  "partitioned = true under [panel]." if _is_dir(path) else "")
        raise r.fail(
            "file",
            f"names '{raw_file}', whose type '{path.suffix or '(none)'}' is not read; "
            f"use one of {', '.join(DATA_SUFFIXES)}.{folder}",
        )
    spec = PanelSpec(
        file=path,
        market=r.get("market", r.opt_string, None),
        period=r.get("period", r.string),
        price=r.get("price", r.string),
        quantity=r.get("quantity", r.string),
        sellers=r.get("sellers", r.opt_string, None),
        concentration=r.get("concentration", r.opt_string, None),
        drop_missing=r.get("drop_missing", r.boolean, False),
        sheet=r.get("sheet", r.opt_string, None),
        delimiter=r.get("delimiter", _one_char(r), None),
        decimal=r.get("decimal", _one_char(r), None),
        thousands=r.get("thousands", _one_char(r), None),
        partitioned=partitioned,
    )
    r.finish()
    if spec.decimal is not None and spec.decimal == spec.thousands:
        raise r.fail("decimal", f"and panel.thousands are both {spec.decimal!r}; they must "
                     "differ.")
    roles = {
        "market": spec.market,
        "period": spec.period,
        "price": spec.price,
        "quantity": spec.quantity,
        "sellers": spec.sellers,
        "concentration": spec.concentration,
    }
    seen: dict[str, str] = {}
    for role, col in roles.items():
        if col is None:
            continue
        if col in seen:
            raise StudyFileError(
                f"Study file {file}: column '{col}' is given both as panel.{seen[col]} "
                f"and panel.{role}; each role needs its own column."
            )
        seen[col] = role
    return spec


def _is_dir(path: Path) -> bool:
    try:
        return path.is_dir()
    except (OSError, ValueError):  # a name too long for the system, say
        return False


def _one_char(r: TableReader) -> Callable[[Any, str], str]:
    def conv(value: Any, key: str) -> str:
        if not isinstance(value, str) or len(value) != 1 or value in "\r\n\"":
            raise r.fail(key, f"must be a single character such as \",\" \";\" or \".\", "
                              f"got {value!r}.")
        return value

    return conv


def _demand(t: dict[str, Any], file: Path) -> DemandSpec:
    r = TableReader(t, "demand", file)
    spec = DemandSpec(
        form=r.get("form", r.choice(get_args(Form)), "linear"),
        shifters=r.get("shifters", r.strings, ()),
        rotators=r.get("rotators", r.strings, ()),
        instruments=r.get("instruments", r.strings),
        effects=r.get("effects", r.choices(get_args(Effect)), ()),
        estimator=r.get("estimator", r.choice(get_args(Estimator)), "2sls"),
        errors=r.get("errors", r.choice(get_args(Errors)), "cluster"),
        hac_lags=r.get("hac_lags", r.integer, None),
        cluster=r.get("cluster", r.strings, ()),
    )
    r.finish()
    if len(spec.cluster) > 2:
        raise r.fail("cluster", f"lists {len(spec.cluster)} dimensions; at most two "
                     "(e.g. [\"market\", \"period\"]) are supported.")
    if spec.cluster and spec.errors != "cluster":
        raise r.fail("cluster", f"is set but errors = \"{spec.errors}\"; set errors = "
                     "\"cluster\" to cluster.")
    if not spec.instruments:
        raise r.fail("instruments", "is empty: price is endogenous and needs at least one "
                     "excluded instrument (typically a cost shifter).")
    if spec.hac_lags is not None and not 0 <= spec.hac_lags <= MAX_HAC_LAGS:
        raise r.fail("hac_lags", f"must be zero or positive, at most {MAX_HAC_LAGS} (and "
                     f"fewer than the periods in the panel), got {spec.hac_lags}.")
    overlap = set(spec.instruments) & (set(spec.shifters) | set(spec.rotators))
    if overlap:
        raise r.fail(
            "instruments",
            f"repeats {', '.join(sorted(overlap))}, already a demand shifter or rotator "
            "(included exogenous variables cannot also be excluded instruments).",
        )
    return spec


def _supply(t: dict[str, Any], file: Path) -> SupplySpec:
    r = TableReader(t, "supply", file)
    spec = SupplySpec(
        cost_shifters=r.get("cost_shifters", r.strings, ()),
        cost_slope=r.get("cost_slope", r.boolean, True),
        instruments=r.get("instruments", r.strings, ()),
        regimes=r.get("regimes", r.opt_string, None),
        groups=r.get("groups", r.opt_string, None),
        break_test=r.get("break_test", r.boolean, False),
        rolling_window=r.get("rolling_window", r.integer, 0),
        instrument_sets=r.get("instrument_sets", _instrument_sets(r), ()),
    )
    r.finish()
    if spec.rolling_window < 0 or spec.rolling_window == 1:
        raise r.fail("rolling_window", f"must be 0 (off) or a number of periods >= 2, got "
                     f"{spec.rolling_window}.")
    return spec


InstrumentSets = tuple[tuple[str, tuple[str, ...]], ...]


def _instrument_sets(r: TableReader) -> Callable[[Any, str], InstrumentSets]:
    def conv(value: Any, key: str) -> InstrumentSets:
        if not isinstance(value, dict) or not value:
            raise r.fail(key, "must be a table of named lists of instruments, e.g. "
                              '[supply.instrument_sets] rotation = ["winter_severity"].')
        out = []
        for name, cols in value.items():
            items = r.strings(cols, f"{key}.{name}")
            if not items:
                raise r.fail(f"{key}.{name}", "is empty; list at least one instrument.")
            out.append((str(name), items))
        return tuple(out)

    return conv


def _candidates(t: dict[str, Any] | None, file: Path) -> tuple[Candidate, ...]:
    if t is None:
        return tuple(Candidate(n, v) for n, v in BUILTIN_MODELS.items())
    r = TableReader(t, "models", file)

    def conv(value: Any, key: str) -> tuple[Candidate, ...]:
        if not isinstance(value, list) or not value:
            raise r.fail(key, "must be a non-empty list of model names or {name, theta} tables.")
        out: list[Candidate] = []
        for i, item in enumerate(value):
            if isinstance(item, str):
                if item not in BUILTIN_MODELS:
                    hint = suggest(item, BUILTIN_MODELS)
                    raise r.fail(
                        key,
                        f"item {i + 1} is '{item}'{hint}; built-in models are "
                        f"{', '.join(BUILTIN_MODELS)}; others need {{name = \"...\", theta = x}}.",
                    )
                out.append(Candidate(item, BUILTIN_MODELS[item]))
            elif isinstance(item, dict):
                sub = TableReader(item, f"models.candidates[{i + 1}]", file)
                name = sub.get("name", sub.string)
                theta = sub.get("theta", sub.number)
                sub.finish()
                if name in BUILTIN_MODELS:
                    raise sub.fail("name", f"'{name}' is a built-in model; choose another name.")
                if not 0.0 <= theta <= 1.0:
                    raise sub.fail("theta", f"must lie in [0, 1], got {theta}.")
                out.append(Candidate(name, float(theta)))
            else:
                raise r.fail(key, f"item {i + 1} must be a name or a table, got {item!r}.")
        names = [c.name for c in out]
        dupes = sorted({n for n in names if names.count(n) > 1})
        if dupes:
            raise r.fail(key, f"names {', '.join(dupes)} more than once.")
        return tuple(out)

    cands = r.get("candidates", conv)
    r.finish()
    return cands



def _inference(t: dict[str, Any] | None, file: Path) -> InferenceSpec:
    if t is None:
        return InferenceSpec()
    r = TableReader(t, "inference", file)

    def level(value: Any, key: str) -> float:
        if isinstance(value, bool) or not isinstance(value, int | float) or not 0.5 <= value < 1:
            raise r.fail(key, f"must be a number in [0.5, 1), e.g. 0.95; got {value!r}.")
        return float(value)

    spec = InferenceSpec(
        level=r.get("level", level, 0.95),
        bootstrap=r.get("bootstrap", r.integer, 0),
        seed=r.get("seed", r.integer, 1),
    )
    r.finish()
    if not 0 <= spec.bootstrap <= MAX_BOOTSTRAP:
        raise r.fail("bootstrap", f"must be 0 (analytic only) or a positive count up to "
                     f"{MAX_BOOTSTRAP:,}, got {spec.bootstrap}.")
    if not 0 <= spec.seed < 2**63:
        raise r.fail("seed", f"must be a whole number from 0 to 2**63 - 1, got {spec.seed}.")
    return spec


def _output(t: dict[str, Any] | None, file: Path) -> OutputSpec:
    if t is None:
        return OutputSpec(runs=file.parent / "runs")
    r = TableReader(t, "output", file)
    spec = OutputSpec(runs=resolve_path(file.parent, r.get("runs", r.string, "runs"),
                                        "output.runs"))
    r.finish()
    return spec


def _check_roles(panel: PanelSpec, demand: DemandSpec, supply: SupplySpec | None,
                 file: Path) -> None:
    """Refuse a column used in two roles that cannot both hold."""
    keys = {panel.market: "panel.market", panel.period: "panel.period",
            panel.price: "panel.price", panel.quantity: "panel.quantity"}
    lists = [("demand.shifters", demand.shifters), ("demand.rotators", demand.rotators),
             ("demand.instruments", demand.instruments)]
    if supply is not None:
        lists += [("supply.cost_shifters", supply.cost_shifters),
                  ("supply.instruments", supply.instruments)]
    for where, cols in lists:
        for col in cols:
            if col in keys:
                raise StudyFileError(
                    f"Study file {file}: column '{col}' is {keys[col]} and cannot also be "
                    f"listed in {where}; each role needs its own column."
                )
    pairs = [("demand.rotators", demand.rotators, "demand.shifters", demand.shifters)]
    if supply is not None:
        pairs += [
            ("supply.instruments", supply.instruments, "supply.cost_shifters",
             supply.cost_shifters),
        ]
        # A variable may shift both demand and cost (seasonal dummies, say): it is then
        # included in both equations and simply not used as a supply instrument.
    for where, cols, other, other_cols in pairs:
        both = [c for c in cols if c in other_cols]
        if both:
            raise StudyFileError(
                f"Study file {file}: {', '.join(repr(c) for c in both)} in {where} also "
                f"appear(s) in {other}; a variable cannot be included in an equation and "
                "excluded from it at once."
            )


def _check_made(panel: PanelSpec, firms: FirmSpec | None, derived: tuple[DerivedSpec, ...],
                file: Path) -> None:
    """Columns made by [firms] and [derive] need distinct names and data inputs."""
    keys = {c: f"panel.{k}" for k, c in (("market", panel.market), ("period", panel.period))
            if c}
    made = [(c, "[firms]") for c in (firms.outputs() if firms else ())]
    made += [(d.name, f"derive.{d.name}") for d in derived]
    check_made_names(made, keys, file)
    for d in derived:
        for c in d.of:
            if c in keys:
                raise StudyFileError(
                    f"Study file {file}: key 'derive.{d.name}.of' uses {keys[c]} '{c}'; "
                    "keys are labels, not numbers (op = \"season\" reads the period)."
                )


def parse_study(text: str, path: Path) -> Study:
    """Parse and validate study-file text.

    Parameters
    ----------
    text : str
        TOML text of the study file.
    path : Path
        Where it came from; relative paths resolve against its folder.

    Returns
    -------
    Study
        The validated, frozen study.

    Raises
    ------
    StudyFileError
        On invalid TOML, unknown keys, wrong types or missing required keys.
    """
    path = path.resolve()
    try:
        raw = tomllib.loads(text)
    except tomllib.TOMLDecodeError as exc:
        raise StudyFileError(f"Study file {path} is not valid TOML: {exc}.") from None
    top = TableReader(raw, "", path)
    title = top.get("title", top.string, path.stem)
    panel = _panel(sub_table(top, "panel", True) or {}, path)
    demand = _demand(sub_table(top, "demand", True) or {}, path)
    supply_t = sub_table(top, "supply", False)
    supply = _supply(supply_t, path) if supply_t is not None else None
    candidates = _candidates(sub_table(top, "models", False), path)
    inference = _inference(sub_table(top, "inference", False), path)
    output = _output(sub_table(top, "output", False), path)
    top.used.update(("sources", "firms", "derive"))
    sources = (parse_sources(raw["sources"], path, panel.market, panel.period, DATA_SUFFIXES)
               if "sources" in raw else ())
    firms_t = sub_table(top, "firms", False)
    firms = (parse_firms(firms_t, path, panel.market, panel.period, DATA_SUFFIXES)
             if firms_t is not None else None)
    derive_t = sub_table(top, "derive", False)
    derived = parse_derived(derive_t, path) if derive_t is not None else ()
    top.finish()
    _check_roles(panel, demand, supply, path)
    _check_made(panel, firms, derived, path)
    return Study(
        path=path,
        title=title,
        panel=panel,
        demand=demand,
        supply=supply,
        candidates=candidates,
        inference=inference,
        output=output,
        text=text,
        sources=sources,
        firms=firms,
        derived=derived,
    )


def load_study(path: str | Path) -> Study:
    """Read and validate a study file.

    Parameters
    ----------
    path : str or Path
        The TOML study file.

    Returns
    -------
    Study
    """
    p = Path(path)
    if p.is_dir():
        raise StudyFileError(f"Study file {p} is a directory; give the path of a .toml file.")
    try:
        data = p.read_bytes()
    except FileNotFoundError:
        raise StudyFileError(f"Study file {p} does not exist.") from None
    except OSError as exc:
        raise StudyFileError(f"Study file {p} cannot be read: {exc.strerror}.") from None
    try:
        text = data.decode("utf-8-sig")
    except UnicodeDecodeError as exc:
        raise StudyFileError(
            f"Study file {p} is not UTF-8 text (byte {exc.start}); save it as UTF-8."
        ) from None
    return parse_study(text, p)
