"""Turn :class:`~conduct.pipeline.Results` into the machine-readable ``summary.json``.

The stable keys of the design (``data``, ``demand``, ``conduct``, ``menu``,
``costs``, ``warnings``) are always present; sections that a study does not
estimate hold ``null``.  Floats are plain JSON numbers (NaN and infinities
become ``null``); keys are sorted when written.
"""

from __future__ import annotations

import math
from typing import Any

import numpy as np
from scipy import stats

from conduct.menu import MenuResult, PairTest
from conduct.pipeline import Results
from conduct.regimes import SplitResult

__all__ = ["CAUTION", "build_summary", "clean"]

CAUTION = (
    "Conduct estimates are economic evidence under stated assumptions (functional forms, "
    "valid instruments, static conduct), not proof of an infringement. Dynamic collusion can "
    "look like Cournot or competition in a static conduct parameter (Corts 1999). Defer to "
    "the applicable competition law and to qualified counsel; keep confidential data "
    "confidential."
)


def clean(value: Any) -> Any:
    """Recursively convert numpy scalars/arrays and non-finite floats for JSON."""
    if isinstance(value, dict):
        return {str(k): clean(v) for k, v in value.items()}
    if isinstance(value, list | tuple):
        return [clean(v) for v in value]
    if isinstance(value, np.ndarray):
        return [clean(v) for v in value.tolist()]
    if isinstance(value, np.generic):
        value = value.item()
    if isinstance(value, float) and not math.isfinite(value):
        return None
    return value


def _pairs(ps: tuple[PairTest, ...]) -> list[dict[str, Any]]:
    return [{"a": p.a, "b": p.b, "t_rv": p.t_rv, "p": p.p, "f": p.f, "weak": p.weak,
             "better": p.better, "rho": p.rho, "q_a": p.q_a, "q_b": p.q_b,
             "size_bound": p.size_bound, "power_bound": p.power_bound} for p in ps]


def _menu(menu: MenuResult | None) -> dict[str, Any] | None:
    if menu is None:
        return None
    return {
        "pairs": _pairs(menu.pairs), "best": list(menu.best), "reading": menu.reading(),
        "level": menu.level, "observations": menu.observations, "skipped": list(menu.skipped),
        "sets": [{"name": s.name, "instruments": list(s.instruments), "df": s.df,
                  "best": list(s.best), "lack_of_fit": s.lack_of_fit,
                  "reading": s.reading(menu.level), "pairs": _pairs(s.pairs)}
                 for s in menu.sets],
    }


def _ar_fields(ar: tuple[float, int, float] | None) -> dict[str, Any]:
    if ar is None:
        return {"ar_stat": None, "ar_df": None, "ar_p": None}
    return {"ar_stat": ar[0], "ar_df": ar[1], "ar_p": ar[2]}


def _regime_shift_section(res: Results) -> dict[str, Any]:
    """The conduct section when conduct is identified by known regimes only."""
    rs = res.regime_shift
    assert rs is not None
    level = res.study.inference.level
    z = float(stats.norm.ppf(0.5 + level / 2))
    first = rs.shifts[0]
    tests = {}
    for c in res.study.candidates:
        if c.theta is None:
            continue
        stat = ((first.theta - c.theta) / first.se) ** 2
        p = float(stats.chi2.sf(stat, 1))
        tests[c.name] = {"stat": stat, "p": p, "rejected": p < 1 - level,
                         "null": f"{c.name}: theta = {c.theta:g} in regime '{first.label}'",
                         "ar_stat": None, "ar_df": None, "ar_p": None}
    kept = [k for k, v in tests.items() if not v["rejected"]]
    return {
        "mode": "regime-shift",
        "theta": first.theta, "se": first.se,
        "ci": [first.theta - z * first.se, first.theta + z * first.se],
        "level": level, "ar_set": None, "tests": tests,
        "verdict": kept[0] if len(kept) == 1 else "inconclusive",
        "not_rejected": kept, "identified": True,
        "identification": res.identification.reason,
        "cournot_benchmark": None,
        "regime_shift": {
            "column": rs.column, "base": rs.base, "elasticity": rs.elasticity,
            "reading": rs.reading(),
            "regimes": [{"label": x.label, "price_effect": x.price_effect,
                         "price_effect_se": x.price_effect_se, "theta": x.theta, "se": x.se}
                        for x in rs.shifts],
        },
    }


def _split(split: SplitResult | None) -> dict[str, Any] | None:
    if split is None:
        return None
    return {
        "column": split.column,
        "equality": {"stat": split.equality_stat, "df": split.equality_df,
                     "p": split.equality_p},
        "reading": split.reading(),
        "thetas": [
            {"label": g.label, "theta": g.theta, "se": g.se, "ci": list(g.ci), "rows": g.rows,
             "p_competitive": g.p_competitive, "p_holm": g.p_holm, "p_bh": g.p_bh}
            for g in split.groups
        ],
    }


def build_summary(res: Results) -> dict[str, Any]:
    """Build the ``summary.json`` document of a run (without run provenance).

    Parameters
    ----------
    res : Results

    Returns
    -------
    dict
        JSON-ready nested dictionary with the design's stable keys.
    """
    d = res.panel.description
    dem = res.demand
    coefs = dem.coefficients()
    demand = {
        "form": dem.form,
        "estimator": dem.fit.estimator,
        "errors": dem.fit.cov_spec.kind,
        "convention": dem.fit.convention,
        "observations": dem.fit.nobs,
        "effects": list(res.study.demand.effects),
        "fixed_effects_method": dem.prepared.absorbed.method,
        "coefficients": {
            name: {"estimate": float(row.estimate), "se": float(row.se)}
            for name, row in coefs.iterrows()
        },
        "elasticity": {
            "mean": float(np.mean(dem.elasticity)),
            "median": float(np.median(dem.elasticity)),
        },
        "wrong_slope_share": dem.wrong_sign_share,
        "first_stage": {
            fs.name: {"f": fs.f, "p": fs.p, "df": list(fs.df), "partial_r2": fs.partial_r2,
                      "conditional_f": fs.conditional_f, "convention": fs.convention}
            for fs in dem.first_stage
        },
        "instrument_strength": (
            {"effective_f": dem.strength.effective_f,
             "effective_f_critical": dem.strength.effective_critical,
             "weakest_f": dem.strength.weakest_f, "reading": dem.strength.reading}
            if dem.strength is not None else None
        ),
        "ar_set": (
            {"intervals": [list(iv) for iv in dem.ar_set.intervals], "kind": dem.ar_set.kind,
             "level": dem.ar_set.level, "reading": dem.ar_set.describe(dem.price_terms[0]),
             "convention": dem.ar_set.convention}
            if dem.ar_set is not None else {"note": dem.ar_note}
        ),
        "endogeneity": (
            {"stat": dem.endogeneity.stat, "df": dem.endogeneity.df, "p": dem.endogeneity.p,
             "null": dem.endogeneity.null, "convention": dem.endogeneity.convention}
            if dem.endogeneity is not None else None
        ),
        "hansen_j": (
            {"stat": dem.fit.j_stat, "p": dem.fit.j_p, "df": dem.fit.j_df,
             "convention": dem.fit.j_convention}
            if dem.fit.j_stat is not None else None
        ),
        "instruments": list(dem.instruments),
    }
    conduct: dict[str, Any] | None = None
    costs: dict[str, Any] | None = None
    s = res.supply
    if s is not None:
        coef_s = s.coefficients()
        conduct = {
            "theta": s.theta,
            "se": s.se,
            "se_naive": s.se_naive,
            "se_method": "sequential GMM (Newey-McFadden 1994, sec. 6), "
                         f"{s.prepared.cov.kind} by market",
            "ci": list(s.ci),
            "level": res.study.inference.level,
            "ar_set": (
                {"intervals": [list(iv) for iv in res.theta_set.intervals],
                 "kind": res.theta_set.kind, "level": res.theta_set.level,
                 "df": res.theta_set.df, "searched": list(res.theta_set.searched),
                 "reading": res.theta_set.describe(),
                 "note": "null bounds mean the set runs past the searched range"}
                if res.theta_set is not None else None
            ),
            "tests": {
                t.name: {"stat": t.stat, "p": t.p, "delta": t.delta, "se": t.se,
                         "rejected": t.rejected, "null": t.null,
                         **_ar_fields(res.candidate_ar.get(t.name))}
                for t in s.tests
            },
            "verdict": s.verdict,
            "not_rejected": list(s.not_rejected),
            "identified": res.identification.identified,
            "identification": res.identification.reason,
            "cournot_benchmark": s.cournot_benchmark,
            "observations": len(s.rows),
            "coefficients": {
                name: {"estimate": float(row.estimate), "se": float(row.se),
                       "se_naive": float(row.se_naive)}
                for name, row in coef_s.iterrows()
            },
            "first_stage": {
                fs.name: {"f": fs.f, "p": fs.p, "df": list(fs.df),
                          "partial_r2": fs.partial_r2, "convention": fs.convention}
                for fs in s.first_stage
            },
            "instruments": list(s.instruments),
            "regimes": _split(res.regimes),
            "groups": _split(res.groups),
            "break": (
                {"stat": res.breaks.stat, "p": res.breaks.p, "date": res.breaks.date,
                 "critical": {f"{k:g}": v for k, v in res.breaks.critical.items()},
                 "theta_before": res.breaks.theta_before, "theta_after": res.breaks.theta_after,
                 "se_before": res.breaks.se_before, "se_after": res.breaks.se_after,
                 "trimming": 0.15, "reading": res.breaks.reading(),
                 "path": [{"date": d, "wald": w} for d, w in res.breaks.path]}
                if res.breaks is not None else None
            ),
            "rolling": (
                {"window": res.rolling.window,
                 "windows": [{"start": a, "end": b, "theta": t, "se": e}
                             for a, b, t, e in zip(res.rolling.starts, res.rolling.ends,
                                                   res.rolling.theta, res.rolling.se,
                                                   strict=True)]}
                if res.rolling is not None else None
            ),
            "instrument_strength": (
                {"effective_f": s.strength.effective_f,
                 "effective_f_critical": s.strength.effective_critical,
                 "weakest_f": s.strength.weakest_f, "reading": s.strength.reading}
                if s.strength is not None else None
            ),
            "bootstrap": (
                {"replications": res.bootstrap.replications, "failures": res.bootstrap.failures,
                 "se": res.bootstrap.se, "ci": list(res.bootstrap.ci),
                 "seed": res.bootstrap.seed, "method": "cluster bootstrap by market, both "
                 "stages re-estimated, percentile interval"}
                if res.bootstrap is not None else None
            ),
        }
        costs = {
            "marginal_cost_mean": res.derived.marginal_cost_mean,
            "lerner_mean": res.derived.lerner_mean,
            "negative_cost_share": res.derived.negative_cost_share["estimated"],
            "negative_cost_share_by_model": res.derived.negative_cost_share,
        }
    if res.regime_shift is not None:
        conduct = _regime_shift_section(res)
    summary = {
        "title": res.study.title,
        "data": {
            "file": res.study.panel.file.name,
            "sha256": d.sha256,
            "rows": d.rows,
            "markets": d.markets,
            "periods": d.periods,
            "first_period": d.first_period,
            "last_period": d.last_period,
            "dropped_rows": d.dropped_rows,
            "dropped_by_column": d.dropped_detail,
            "balanced": d.balanced,
            "gaps": d.gaps,
            "sources": res.panel.assembly.sources_document() if res.panel.assembly else {},
            "derived": res.panel.assembly.derived_document() if res.panel.assembly else {},
        },
        "demand": demand,
        "conduct": conduct,
        "menu": _menu(res.menu),
        "costs": costs,
        "warnings": list(res.warnings),
        "caution": CAUTION,
    }
    return clean(summary)
