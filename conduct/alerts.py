"""Alert conditions for scheduled reruns.

A script that reruns a study every quarter asks, with ``--alert``, to be told
when something it cares about happened: the verdict changed since the last
run (``verdict-change``), the break test found a break (``break``), or theta
moved by more than a threshold (``theta-shift=0.1``).  Conditions are read
from plain strings, checked against the new and the previous ``summary.json``
documents, and reported as sentences; the command line exits with code 3 when
any is met.
"""

from __future__ import annotations

from collections.abc import Mapping, Sequence
from dataclasses import dataclass
from typing import Any

from conduct.errors import ConductError, suggest

__all__ = ["ALERT_NAMES", "AlertSpec", "evaluate_alerts", "parse_alerts"]

ALERT_NAMES = ("verdict-change", "break", "theta-shift")


@dataclass(frozen=True, slots=True)
class AlertSpec:
    """One alert condition.

    Attributes
    ----------
    name : str
        One of :data:`ALERT_NAMES`.
    threshold : float or None
        For ``theta-shift``: the absolute change in theta that triggers it.
    """

    name: str
    threshold: float | None = None


def parse_alerts(texts: Sequence[str]) -> tuple[AlertSpec, ...]:
    """Read ``--alert`` values.

    Parameters
    ----------
    texts : sequence of str
        E.g. ``["verdict-change", "theta-shift=0.1"]``.

    Returns
    -------
    tuple of AlertSpec

    Raises
    ------
    ConductError
        For an unknown name or a missing or bad threshold.
    """
    out = []
    for text in texts:
        name, _, value = text.partition("=")
        name = name.strip()
        if name not in ALERT_NAMES:
            raise ConductError(
                f"Unknown alert '{name}'{suggest(name, ALERT_NAMES)}; alerts are "
                "verdict-change, break and theta-shift=X (X an absolute change in theta)."
            )
        threshold = None
        if name == "theta-shift":
            try:
                threshold = float(value)
            except ValueError:
                raise ConductError(
                    f"Alert '{text}' needs a threshold, e.g. theta-shift=0.1."
                ) from None
            if not threshold > 0:
                raise ConductError(f"Alert '{text}': the threshold must be positive.")
        elif value:
            raise ConductError(f"Alert '{name}' takes no value; got '{text}'.")
        out.append(AlertSpec(name, threshold))
    return tuple(out)


def evaluate_alerts(specs: Sequence[AlertSpec], current: Mapping[str, Any],
                    previous: Mapping[str, Any] | None) -> list[str]:
    """Sentences for each alert condition that is met.

    Parameters
    ----------
    specs : sequence of AlertSpec
    current : mapping
        The new run's summary.
    previous : mapping or None
        The previous run's summary (None for the first run: no change can be met).

    Returns
    -------
    list of str
        Empty when no condition is met.
    """
    met = []
    cur = current.get("conduct") or {}
    prev = (previous or {}).get("conduct") or {}
    prev_id = ((previous or {}).get("run") or {}).get("id", "the previous run")
    for spec in specs:
        if spec.name == "verdict-change" and prev and cur.get("verdict") != prev.get("verdict"):
            met.append(f"ALERT verdict-change: the verdict is '{cur.get('verdict')}', it was "
                       f"'{prev.get('verdict')}' in run {prev_id}.")
        elif spec.name == "break":
            brk = cur.get("break") or {}
            if brk and brk.get("p") is not None and brk["p"] < 0.05:
                met.append(f"ALERT break: the sup-Wald test finds a break in conduct (p = "
                           f"{brk['p']:.3f}), most likely from {brk.get('date')}.")
        elif spec.name == "theta-shift" and prev and cur.get("theta") is not None \
                and prev.get("theta") is not None:
            shift = float(cur["theta"]) - float(prev["theta"])
            assert spec.threshold is not None
            if abs(shift) > spec.threshold:
                met.append(f"ALERT theta-shift: theta moved by {shift:+.4f} (from "
                           f"{prev['theta']:.4f} in run {prev_id} to {cur['theta']:.4f}), "
                           f"more than {spec.threshold:g}.")
    return met
