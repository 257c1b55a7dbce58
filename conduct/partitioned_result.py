"""What the partitioned path returns: coefficients, theta, tests, and its JSON file.

:class:`PartitionedResult` is the frozen result of
:func:`conduct.partitioned.estimate_partitioned`; :meth:`PartitionedResult.summary`
gives the headline lines for the terminal, :meth:`PartitionedResult.document` a
JSON-ready document (keys as in ``summary.json`` where they mean the same), and
:func:`write_result` writes that document atomically under
``<runs>/partitioned/``.  Partitioned results stay out of the run history, whose
run folders hold the in-memory path's full outputs.
"""

from __future__ import annotations

import datetime as dt
import hashlib
import json
import os
import re
import textwrap
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd
from scipy import stats

from conduct.errors import ConductError
from conduct.study import Study
from conduct.supply import CandidateTest

__all__ = ["Coefficients", "PartitionedResult", "coefficients", "write_result"]

_LABEL = re.compile(r"^[A-Za-z0-9][A-Za-z0-9._-]{0,63}$")  # the run-label rule of conduct.runs


@dataclass(frozen=True, slots=True)
class Coefficients:
    """Estimates with standard errors.

    Attributes
    ----------
    names : tuple of str
    estimate, se : numpy.ndarray
        (k,) each.
    cov : numpy.ndarray
        (k, k).
    """

    names: tuple[str, ...]
    estimate: np.ndarray
    se: np.ndarray
    cov: np.ndarray

    def table(self) -> pd.DataFrame:
        """Estimate, standard error, z and p-value by term."""
        z = np.divide(self.estimate, self.se, out=np.full_like(self.se, np.nan),
                      where=self.se > 0)
        return pd.DataFrame({"estimate": self.estimate, "se": self.se, "z": z,
                             "p": 2 * stats.norm.sf(np.abs(z))},
                            index=pd.Index(self.names, name="term"))


def coefficients(names: tuple[str, ...], b: np.ndarray, cov: np.ndarray) -> Coefficients:
    """Coefficients with standard errors from the diagonal of ``cov``."""
    return Coefficients(names, b, np.sqrt(np.clip(np.diag(cov), 0.0, None)), cov)


@dataclass(frozen=True, slots=True)
class PartitionedResult:
    """What the partitioned path estimated.

    Attributes
    ----------
    study : Study
    demand : Coefficients
        Demand coefficients with the study's covariance (cluster-robust by market,
        robust or homoskedastic).
    demand_hansen_j : (float, int, float) or None
        Hansen's J, its degrees of freedom and p-value, when over-identified.
    elasticity_mean : float
    wrong_sign_share : float
        Share of rows where the estimated demand slope is not negative.
    supply : Coefficients or None
        Supply relation with the sequential covariance (accounts for demand's estimation).
    supply_se_naive : numpy.ndarray or None
        Second-stage standard errors that ignore demand's estimation (comparison only).
    supply_hansen_j : (float, int, float) or None
    theta, se, se_naive : float or None
    ci : (float, float) or None
        Wald interval at the study's level from the sequential standard error.
    tests : tuple of CandidateTest
    verdict : str or None
    not_rejected : tuple of str
    cournot_benchmark : float or None
        Q*-weighted mean of H (or 1/N).
    rows, markets, periods, supply_rows : int
    first_period, last_period : str
    dropped_rows : int
    dropped_detail : dict of str to int
    files, partitions : int
    root : Path
    not_computed : tuple of str
        What the in-memory path reports and this path does not.
    warnings : tuple of str
    conventions : dict of str to str
        Small-sample convention of each covariance.
    """

    study: Study
    demand: Coefficients
    demand_hansen_j: tuple[float, int, float] | None
    elasticity_mean: float
    wrong_sign_share: float
    supply: Coefficients | None
    supply_se_naive: np.ndarray | None
    supply_hansen_j: tuple[float, int, float] | None
    theta: float | None
    se: float | None
    se_naive: float | None
    ci: tuple[float, float] | None
    tests: tuple[CandidateTest, ...]
    verdict: str | None
    not_rejected: tuple[str, ...]
    cournot_benchmark: float | None
    rows: int
    markets: int
    periods: int
    supply_rows: int
    first_period: str
    last_period: str
    dropped_rows: int
    dropped_detail: dict[str, int]
    files: int
    partitions: int
    root: Path
    not_computed: tuple[str, ...]
    warnings: tuple[str, ...]
    conventions: dict[str, str] = field(default_factory=dict)

    def summary(self) -> str:
        """The headline numbers as a few lines of text."""
        level = self.study.inference.level
        d = self.study.demand
        lines = [
            self.study.title,
            f"data        partitioned Parquet dataset {self.root} ({self.files} file"
            f"{'s' if self.files != 1 else ''} read in {self.partitions} part"
            f"{'s' if self.partitions != 1 else ''})",
            f"panel       rows {self.rows}, markets {self.markets}, periods {self.periods} "
            f"({self.first_period} to {self.last_period})",
            f"demand      {d.form} by 2sls, errors {d.errors}; mean elasticity "
            f"{self.elasticity_mean:.3f}",
        ]
        if self.dropped_rows:
            lines.append(f"dropped     {self.dropped_rows} rows with missing values")
        if self.theta is not None and self.ci is not None:
            lines.append(f"theta       {self.theta:.4f} (se {self.se:.4f}, naive "
                         f"{self.se_naive:.4f}), {level:.0%} CI [{self.ci[0]:.4f}, "
                         f"{self.ci[1]:.4f}]")
            if self.cournot_benchmark is not None:
                lines.append(f"cournot H   {self.cournot_benchmark:.4f} (Q*-weighted)")
            for t in self.tests:
                state = "rejected" if t.rejected else "not rejected"
                lines.append(f"test {t.name:<14} Wald {t.stat:9.2f}, p {t.p:.4f}, {state}")
            lines.append(f"verdict     {self.verdict}")
        notes = ["not computed on the partitioned path: " + "; ".join(self.not_computed) + ".",
                 *(f"warning: {w}" for w in self.warnings),
                 "note: estimates are economic evidence under stated assumptions, not a legal "
                 "finding."]
        lines += [textwrap.fill(t, width=88, break_long_words=False, break_on_hyphens=False)
                  for t in notes]
        return "\n".join(lines)

    def document(self) -> dict[str, Any]:
        """A JSON-ready document of the result (keys as in ``summary.json`` where shared)."""

        def coefs(c: Coefficients) -> dict[str, dict[str, float]]:
            return {n: {"estimate": float(b), "se": float(s)}
                    for n, b, s in zip(c.names, c.estimate, c.se, strict=True)}

        def j(v: tuple[float, int, float] | None) -> dict[str, float] | None:
            return None if v is None else {"stat": v[0], "df": v[1], "p": v[2]}

        doc: dict[str, Any] = {
            "path": "partitioned",
            "data": {"rows": self.rows, "markets": self.markets, "periods": self.periods,
                     "first_period": self.first_period, "last_period": self.last_period,
                     "dropped_rows": self.dropped_rows, "dropped_detail": self.dropped_detail,
                     "directory": str(self.root), "files": self.files,
                     "partitions": self.partitions},
            "demand": {"form": self.study.demand.form, "estimator": "2sls",
                       "errors": self.study.demand.errors,
                       "coefficients": coefs(self.demand),
                       "elasticity": {"mean": self.elasticity_mean},
                       "wrong_sign_share": self.wrong_sign_share,
                       "hansen_j": j(self.demand_hansen_j)},
            "conduct": None,
            "conventions": dict(self.conventions),
            "not_computed": list(self.not_computed),
            "warnings": list(self.warnings),
        }
        if self.supply is not None and self.ci is not None:
            naive = self.supply_se_naive
            doc["conduct"] = {
                "theta": self.theta, "se": self.se, "se_naive": self.se_naive,
                "ci": list(self.ci), "level": self.study.inference.level,
                "verdict": self.verdict, "not_rejected": list(self.not_rejected),
                "cournot_benchmark": self.cournot_benchmark, "supply_rows": self.supply_rows,
                "coefficients": {n: {**v, "se_naive": float(s)} for (n, v), s in zip(
                    coefs(self.supply).items(), naive if naive is not None else [],
                    strict=True)},
                "hansen_j": j(self.supply_hansen_j),
                "tests": {t.name: {"stat": t.stat, "p": t.p, "rejected": t.rejected,
                                   "delta": t.delta, "se": t.se, "null": t.null}
                          for t in self.tests},
            }
        return doc


def _finite(value: Any) -> Any:
    """``value`` with NaN and infinite floats replaced by None (JSON null), recursively."""
    if isinstance(value, dict):
        return {k: _finite(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [_finite(v) for v in value]
    if isinstance(value, float) and not np.isfinite(value):
        return None
    return value


def write_result(res: PartitionedResult, *, label: str | None = None,
                 argv: tuple[str, ...] | list[str] = ()) -> tuple[Path, dict[str, Any]]:
    """Write the result as ``<runs>/partitioned/<id>.json``, atomically.

    The file is written under a hidden temporary name and renamed; an existing
    file is never replaced.  Partitioned results stay out of the run history
    (:mod:`conduct.runs`), whose run folders hold the in-memory path's outputs.

    Parameters
    ----------
    res : PartitionedResult
    label : str or None
        File name (without ``.json``) instead of the time-based id.
    argv : sequence of str
        The command line, recorded for provenance.

    Returns
    -------
    (Path, dict)
        The file written and its document.
    """
    if label is not None and not _LABEL.match(label):
        raise ConductError(
            f"Run label '{label}' is not allowed: use 1-64 letters, digits, '.', '_' or '-', "
            "starting with a letter or digit."
        )
    folder = res.study.output.runs / "partitioned"
    try:
        folder.mkdir(parents=True, exist_ok=True)
    except OSError as exc:
        raise ConductError(f"Cannot create the folder {folder}: {exc.strerror}.") from None
    now = dt.datetime.now(dt.UTC).replace(microsecond=0)
    doc = res.document()
    doc["provenance"] = {
        "command": list(argv), "created_utc": now.isoformat().replace("+00:00", "Z"),
        "study_file": str(res.study.path),
        "study_sha256": hashlib.sha256(res.study.text.encode("utf-8")).hexdigest(),
    }
    base = label or f"{now:%Y%m%dT%H%M%SZ}"
    tmp = folder / f".incomplete-{base}-{os.getpid()}.json"
    text = json.dumps(_finite(doc), indent=2, sort_keys=True, allow_nan=False) + "\n"
    try:
        tmp.write_text(text, encoding="utf-8")
        for i in range(1, 1000):
            target = folder / (f"{base}.json" if i == 1 else f"{base}-{i}.json")
            try:
                os.link(tmp, target)  # atomic, and fails rather than replace a file
            except FileExistsError:
                continue
            return target, doc
        raise ConductError(f"Could not find a free file name for '{base}' in {folder}.")
    finally:
        tmp.unlink(missing_ok=True)
