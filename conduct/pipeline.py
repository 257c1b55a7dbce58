"""The whole estimation job as one function: study -> panel -> demand -> conduct -> costs.

:func:`estimate` is the Python API behind ``conduct estimate``: it returns a
frozen :class:`Results` whose fields are the stage results (frozen
dataclasses) and pandas tables.  It writes nothing; run folders are the job
of :mod:`conduct.runs`.
"""

from __future__ import annotations

from dataclasses import dataclass
from pathlib import Path

import numpy as np
from jinja2 import Environment

from conduct.bootstrap import BootstrapResult, cluster_bootstrap
from conduct.breaks import BreakResult, RollingResult, rolling_theta, sup_wald_break
from conduct.demand import DemandResult, estimate_demand
from conduct.derived import Derived, derive
from conduct.errors import ConductError
from conduct.executor import make_mapper
from conduct.identify import Identification, check_identification
from conduct.menu import MenuResult, menu_test
from conduct.panel import Panel, load_panel
from conduct.regimes import RegimeShiftResult, SplitResult, regime_shift, theta_by
from conduct.study import Study, load_study
from conduct.supply import SupplyResult, estimate_supply
from conduct.thetaset import ThetaSet, ar_inference

__all__ = ["Results", "estimate"]

COND_WARN = 1e6  # common practice: beyond this, least-squares results lose digits

_HTML = Environment(autoescape=True).from_string(
    """<div class="conduct-results"><h4>{{ title }}</h4><p>{{ desc }}</p>
<table><tr><th>mean elasticity</th><td>{{ elasticity }}</td></tr>
{% if theta is not none %}<tr><th>theta</th><td>{{ theta }} (se {{ se }}),
{{ level }} CI {{ ci }}</td></tr><tr><th>verdict</th><td><b>{{ verdict }}</b></td></tr>
{% endif %}</table>
{% if tests %}<table><tr><th>model</th><th>Wald</th><th>p</th><th>decision</th></tr>
{% for t in tests %}<tr><td>{{ t[0] }}</td><td>{{ t[1] }}</td><td>{{ t[2] }}</td>
<td>{{ t[3] }}</td></tr>{% endfor %}</table>{% endif %}
{% for w in warnings %}<p><i>warning: {{ w }}</i></p>{% endfor %}
<p><small>Economic evidence under stated assumptions, not a legal finding.</small></p></div>"""
)


@dataclass(frozen=True, slots=True)
class Results:
    """Everything one estimation produced.

    Attributes
    ----------
    study : Study
    panel : Panel
    identification : Identification
    demand : DemandResult
    supply : SupplyResult or None
        None for demand-only studies.
    derived : Derived
    theta_set : ThetaSet or None
        Anderson-Rubin confidence set for theta.
    candidate_ar : dict
        Candidate name -> (AR statistic, df, p-value), robust to weak instruments.
    regimes, groups : SplitResult or None
        Theta per known regime / per group of markets, when the study asks.
    menu : MenuResult or None
        Rivers-Vuong menu test of the candidate models.
    regime_shift : RegimeShiftResult or None
        Conduct relative to a base regime (log demand without rotators; Porter 1983).
    breaks : BreakResult or None
        Sup-Wald test for a break at an unknown date, when the study asks.
    rolling : RollingResult or None
        Rolling-window theta, when the study asks.
    bootstrap : BootstrapResult or None
        Cluster bootstrap of theta when ``[inference] bootstrap`` > 0.
    warnings : tuple of str
    """

    study: Study
    panel: Panel
    identification: Identification
    demand: DemandResult
    supply: SupplyResult | None
    derived: Derived
    theta_set: ThetaSet | None
    candidate_ar: dict[str, tuple[float, int, float]]
    regimes: SplitResult | None
    groups: SplitResult | None
    regime_shift: RegimeShiftResult | None
    menu: MenuResult | None
    breaks: BreakResult | None
    rolling: RollingResult | None
    bootstrap: BootstrapResult | None
    warnings: tuple[str, ...]

    def summary(self) -> str:
        """A short plain-text summary of the headline numbers."""
        d = self.demand
        lines = [f"{self.study.title}", self.panel.description.text()]
        lines.append(
            f"demand ({d.form}, {d.fit.estimator}): mean elasticity "
            f"{np.mean(d.elasticity):.3f}, median {np.median(d.elasticity):.3f}"
        )
        for fs in d.first_stage:
            lines.append(f"  first stage {fs.name}: F = {fs.f:.1f}")
        s = self.supply
        if s is not None:
            lo, hi = s.ci
            lines.append(f"theta = {s.theta:.4f} (se {s.se:.4f}), "
                         f"{self.study.inference.level:.0%} CI [{lo:.4f}, {hi:.4f}]")
            for t in s.tests:
                mark = "rejected" if t.rejected else "not rejected"
                lines.append(f"  {t.name:<14} Wald {t.stat:9.2f}  p {t.p:.4f}  {mark}")
            lines.append(f"verdict: {s.verdict}")
        return "\n".join(lines)

    def _repr_html_(self) -> str:
        """A compact HTML summary for notebooks (escaped; no external resources)."""
        s = self.supply
        tests = [] if s is None else [
            (t.name, f"{t.stat:.2f}", f"{t.p:.4f}", "rejected" if t.rejected else "not rejected")
            for t in s.tests
        ]
        return _HTML.render(
            title=self.study.title, desc=self.panel.description.text(),
            elasticity=f"{np.mean(self.demand.elasticity):.3f}",
            theta=None if s is None else f"{s.theta:.4f}",
            se=None if s is None else f"{s.se:.4f}",
            ci=None if s is None else f"[{s.ci[0]:.4f}, {s.ci[1]:.4f}]",
            level=f"{self.study.inference.level:.0%}",
            verdict=None if s is None else s.verdict, tests=tests,
            warnings=self.warnings,
        )

    def __repr__(self) -> str:
        theta = f", theta={self.supply.theta:.4f}" if self.supply is not None else ""
        return (f"Results(study={self.study.title!r}, rows={self.panel.description.rows}"
                f"{theta})")


def _warnings(panel: Panel, ident: Identification, demand: DemandResult,
              supply: SupplyResult | None, study: Study) -> tuple[str, ...]:
    out = list(ident.warnings)
    if panel.description.dropped_rows:
        out.append(f"{panel.description.dropped_rows} rows with missing values were dropped.")
    if demand.wrong_sign_share > 0:
        out.append(
            f"The estimated demand slope is not negative at {demand.wrong_sign_share:.1%} of "
            "observations; those rows get no markup regressor and are left out of the supply "
            "relation."
        )
    if demand.fit.cov_spec.kind == "robust" and "market" in study.demand.effects:
        out.append(
            "Heteroskedasticity-robust errors with market effects are not consistent when "
            "markets have few periods (Stock & Watson 2008); prefer errors = \"cluster\"."
        )
    if demand.fit.cov_spec.kind == "cluster":
        g = panel.description.markets
        if g < 20:
            out.append(f"Only {g} market clusters: cluster-robust inference may be unreliable.")
    stages = [("demand", demand.fit, demand.prepared)]
    if supply is not None:
        stages.append(("supply", supply.fit, supply.prepared))
    for stage, fit, prep in stages:
        if fit.z_condition > COND_WARN:
            out.append(f"The {stage} instruments are badly conditioned (condition number "
                       f"{fit.z_condition:.3g} after scaling): some are nearly collinear, "
                       "so estimates may be numerically fragile.")
        for name, ratio in sorted(prep.thin.items()):
            out.append(f"In the {stage} stage, '{name}' keeps only {ratio:.3g} of its "
                       "variation after the fixed effects are removed: what is left is "
                       "likely rounding noise; drop it or change the effects.")
    for fs in demand.first_stage:
        if fs.f < 10:  # common practice: the Staiger-Stock rule of thumb
            out.append(f"Weak first stage for {fs.name} in demand (F = {fs.f:.1f} < 10).")
    if supply is not None:
        for fs in supply.first_stage:
            if fs.f < 10:
                out.append(f"Weak first stage for {fs.name} in supply (F = {fs.f:.1f} < 10).")
        if supply.h is None and any(c.theta is None for c in study.candidates):
            out.append("No sellers or concentration column: the Cournot candidate was not "
                       "tested.")
    return tuple(out)


def estimate(study: Study | str | Path, *, quiet: bool = True, workers: int | None = None,
             scheduler: str | None = None) -> Results:
    """Run the whole job on a study.

    Parameters
    ----------
    study : Study, str or Path
        A validated study or the path of a study file.
    quiet : bool
        Suppress progress bars (shown only on a terminal anyway).
    workers : int or None
        Run bootstrap replicates on this many local processes.
    scheduler : str or None
        Run bootstrap replicates on the Dask cluster at this address.

    Returns
    -------
    Results

    Raises
    ------
    conduct.errors.ConductError
        For any user error (study file, data, identification, estimation).
    """
    st = study if isinstance(study, Study) else load_study(study)
    ident = check_identification(st)
    panel = load_panel(st)
    demand = estimate_demand(panel, st)
    shift = None
    if ident.mode == "regime-shift" and st.supply is not None and st.supply.regimes:
        shift = regime_shift(panel, st, demand, st.supply.regimes)
        supply = None
    else:
        supply = estimate_supply(panel, st, demand) if st.supply is not None else None
    derived = derive(panel, st, demand, supply)
    menu, menu_note = None, None
    if supply is not None and st.supply is not None:
        sets = ({"supply instruments": supply.instruments, **dict(st.supply.instrument_sets)}
                if st.supply.instrument_sets else None)
        try:
            menu = menu_test(panel, st, demand, supply, instrument_sets=sets)
        except ConductError as exc:
            menu_note = f"Menu test not run: {exc}"
    theta_set, candidate_ar = (ar_inference(panel, st, demand, supply)
                               if supply is not None else (None, {}))
    regimes = groups = breaks = rolling = None
    if supply is not None and st.supply is not None:
        if st.supply.regimes:
            regimes = theta_by(panel, st, demand, st.supply.regimes, "regime")
        if st.supply.groups:
            groups = theta_by(panel, st, demand, st.supply.groups, "group")
        if st.supply.break_test:
            breaks = sup_wald_break(panel, st, demand)
        if st.supply.rolling_window:
            rolling = rolling_theta(panel, st, demand, st.supply.rolling_window)
    boot = None
    if supply is not None and st.inference.bootstrap > 0:
        mapper = make_mapper(workers, scheduler, quiet=quiet, label="bootstrap")
        boot = cluster_bootstrap(panel, st, replications=st.inference.bootstrap,
                                 seed=st.inference.seed, quiet=quiet, mapper=mapper)
    warnings = _warnings(panel, ident, demand, supply, st)
    if menu_note:
        warnings += (menu_note,)
    if menu is not None:
        weak = [f"{p.a} vs {p.b}" + (f" [{ms.name}]" if len(menu.sets) > 1 else "")
                + f" (F = {p.f:.2f})" for ms in menu.sets for p in ms.pairs if p.weak]
        if weak:
            warnings += ("Weak instruments for testing " + ", ".join(weak)
                         + ": the menu test has little power there.",)
    if boot is not None and boot.failures:
        warnings += (f"{boot.failures} of {boot.replications} bootstrap replicates could not "
                     "be estimated and were left out.",)
    return Results(
        study=st, panel=panel, identification=ident, demand=demand, supply=supply,
        derived=derived, theta_set=theta_set, candidate_ar=candidate_ar, regimes=regimes,
        groups=groups, regime_shift=shift, menu=menu, breaks=breaks,
        rolling=rolling, bootstrap=boot, warnings=warnings,
    )
