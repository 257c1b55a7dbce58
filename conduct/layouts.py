"""Writing a simulated panel as several sources, the way an analyst receives real data.

A :class:`SourceLayout` splits the one simulated table into the files a real
study starts from: the main table (prices in current money, quantities and
demand shifters by market and quarter), the cost indexes by market and quarter
from a statistics office, a national producer price index by quarter, and the
firm-level quantities from a registry.  The study file written beside them
joins the sources, aggregates the firms to sellers and a Herfindahl index, and
deflates the price (``[[sources]]``, ``[firms]``, ``[derive]``), so the demo
exercises the assembly of :mod:`conduct.assemble` end to end.

The price index is invented and drawn from its own random stream, so the
simulated market data are exactly those of the one-file layout; the deflated
price equals the simulated (real) price up to the rounding of the files.
"""

from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from conduct.simulate import SimulatedPanel, period_labels

__all__ = ["NOMINAL_PRICE", "PRICE_INDEX", "SourceLayout", "layout_files", "layout_toml",
           "write_sources"]

NOMINAL_PRICE = "price_nominal"
PRICE_INDEX = "ppi"
FIRM_COLUMN = "seller"
#: Relative gap allowed between the firms' total and the industry quantity: both are
#: rounded to 2 decimals in the files, so up to (N + 1) * 0.005 units apart.
FIRM_TOLERANCE = 1e-5


@dataclass(frozen=True, slots=True)
class SourceLayout:
    """Which files a simulated study is split into (file stems; None leaves a part out).

    Attributes
    ----------
    costs : str or None
        Cost indexes by market and period, joined on both keys.
    prices : str or None
        National producer price index by period, joined on period; the main
        table then holds the price in current money and the study deflates it.
    firms : str or None
        Firm x market x period quantities, aggregated to sellers and the
        Herfindahl index; the main table then has neither.
    """

    costs: str | None = "costs"
    prices: str | None = "national"
    firms: str | None = "firms"


def layout_files(layout: SourceLayout, fmt: str) -> tuple[str, ...]:
    """The file names a layout adds beside the main panel."""
    stems = (layout.costs, layout.prices, layout.firms)
    return tuple(f"{s}.{fmt}" for s in stems if s)


def _price_index(sim: SimulatedPanel) -> np.ndarray:
    """An invented national price index per period: 100 in the first, drifting ~2.4% a year."""
    rng = np.random.default_rng([sim.spec.seed, 8_716])
    steps = rng.normal(0.006, 0.008, sim.spec.periods)
    steps[0] = 0.0
    return np.round(100.0 * np.exp(np.cumsum(steps)), 4)


def _write(frame: pd.DataFrame, path: Path, fmt: str) -> None:
    if fmt == "csv":
        frame.to_csv(path, index=False, lineterminator="\n")
    else:
        frame.to_parquet(path, index=False, engine="pyarrow", compression="snappy")


def write_sources(sim: SimulatedPanel, panel: pd.DataFrame, layout: SourceLayout, out: Path,
                  fmt: str) -> pd.DataFrame:
    """Write the layout's extra files and return the main table that remains.

    Parameters
    ----------
    sim : SimulatedPanel
        The simulation (firm outputs, periods).
    panel : pandas.DataFrame
        The one-file panel as it would be written (already rounded).
    layout : SourceLayout
    out : Path
        Folder to write into.
    fmt : {"csv", "parquet"}

    Returns
    -------
    pandas.DataFrame
        The main table to write as ``panel.<fmt>``.
    """
    spec = sim.spec
    mcol, pcol = spec.market_column, spec.period_column
    main = panel.copy()
    if spec.instrument_interactions and spec.rotator:
        main = main.drop(columns=[f"{n}_x_{spec.rotator}" for n, _ in spec.cost_shifters])
    if layout.costs:
        costs = [n for n, _ in spec.cost_shifters]
        _write(main[[mcol, pcol, *costs]], out / f"{layout.costs}.{fmt}", fmt)
        main = main.drop(columns=costs)
    if layout.prices:
        periods = np.asarray(period_labels(spec), dtype=object)
        index = _price_index(sim)
        _write(pd.DataFrame({pcol: periods, PRICE_INDEX: index}),
               out / f"{layout.prices}.{fmt}", fmt)
        per_row = np.tile(index, spec.markets)
        nominal = np.round(main["price"].to_numpy() * per_row / 100.0, 4)
        main.insert(main.columns.get_loc("price"), NOMINAL_PRICE, nominal)
        main = main.drop(columns=["price"])
    if layout.firms:
        present = sim.firms["present"]
        row, slot = np.nonzero(present)
        firms = pd.DataFrame({
            mcol: panel[mcol].to_numpy()[row],
            pcol: panel[pcol].to_numpy()[row],
            FIRM_COLUMN: [f"S{k + 1}" for k in slot],
            spec.quantity_column: np.round(sim.firms["output"][row, slot], 2),
        })
        _write(firms, out / f"{layout.firms}.{fmt}", fmt)
        main = main.drop(columns=["sellers", "hhi"])
    return main


def layout_toml(sim: SimulatedPanel, layout: SourceLayout, fmt: str) -> list[str]:
    """Study-file lines for the layout's sources, firm table and derived variables.

    Parameters
    ----------
    sim : SimulatedPanel
    layout : SourceLayout
    fmt : str

    Returns
    -------
    list of str
        Lines to append after the ``[panel]`` table.
    """
    spec = sim.spec
    q = json.dumps
    lines: list[str] = []
    if layout.costs:
        lines += ["", "[[sources]]  # cost indexes by region and quarter",
                  f"name = {q(layout.costs)}", f"file = {q(f'{layout.costs}.{fmt}')}",
                  'on = ["market", "period"]']
    if layout.prices:
        lines += ["", "[[sources]]  # national producer price index by quarter",
                  f"name = {q(layout.prices)}", f"file = {q(f'{layout.prices}.{fmt}')}",
                  'on = ["period"]']
    if layout.firms:
        lines += ["", "[firms]  # firm quantities -> active sellers and Herfindahl index",
                  f"file = {q(f'{layout.firms}.{fmt}')}", f"firm = {q(FIRM_COLUMN)}",
                  f"quantity = {q(spec.quantity_column)}", 'sellers = "sellers"',
                  'concentration = "hhi"', f"check_total = {q(spec.quantity_column)}",
                  f"tolerance = {FIRM_TOLERANCE:g}"]
    derive: list[str] = []
    if layout.prices:
        derive.append(f'price = {{op = "ratio", of = [{q(NOMINAL_PRICE)}, {q(PRICE_INDEX)}], '
                      "times = 100}  # deflated to first-quarter money")
    if spec.instrument_interactions and spec.rotator:
        for n, _ in spec.cost_shifters:
            derive.append(f'{n}_x_{spec.rotator} = {{op = "product", of = [{q(n)}, '
                          f"{q(spec.rotator)}]}}")
    if derive:
        lines += ["", "[derive]", *derive]
    return lines
