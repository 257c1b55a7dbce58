"""The demand stage: build the demand equation, estimate it by IV, derive slopes.

Linear form (Bresnahan 1982; Lau 1982)::

    Q = a_p P + sum_k a_k (P R_k) + b'X + g'R + FE + e,   dQ/dP = a_p + sum_k a_k R_k

Log form::

    ln Q = (h + sum_k h_k R_k) ln P + b'X + g'R + FE + e,  dQ/dP = (h + sum_k h_k R_k) Q/P

Price and price x rotator are endogenous; the excluded instruments are the
study's instruments W and, for each rotator, W x R_k.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import pandas as pd

from conduct.design import Prepared, prepare
from conduct.diagnostics import (
    EndogeneityTest,
    FirstStage,
    Strength,
    endogeneity_test,
    first_stage_table,
    stage_strength,
)
from conduct.errors import EstimationError
from conduct.iv import IVFit, Projection, checked_design, fit_iv
from conduct.panel import Panel
from conduct.study import Study
from conduct.weakiv import ARSet, anderson_rubin_set

__all__ = ["DemandColumns", "DemandResult", "demand_columns", "estimate_demand", "price_slope"]


@dataclass(frozen=True, slots=True)
class DemandResult:
    """The fitted demand equation and what follows from it at every observation.

    Attributes
    ----------
    fit : IVFit
        The IV fit (names, estimates, covariance, influence functions).
    form : str
        ``linear`` or ``log``.
    price_terms : tuple of str
        Names of the coefficients that enter the slope, price first then
        price x rotator terms.
    slope : numpy.ndarray
        (n,) dQ/dP at each observation.
    slope_grad : numpy.ndarray
        (n, k) derivative of the slope with respect to each coefficient of ``fit``.
    elasticity : numpy.ndarray
        (n,) price elasticity dQ/dP * P/Q.
    wrong_sign_share : float
        Share of observations where the estimated slope is not negative.
    first_stage : tuple of FirstStage
        First-stage diagnostics per endogenous regressor.
    strength : Strength or None
        Effective F and the Stock-Yogo reading (None when diagnostics are skipped).
    ar_set : ARSet or None
        Anderson-Rubin confidence set for the price coefficient (one endogenous
        regressor, i.e. no rotators, and non-HAC errors only).
    ar_note : str
        Why there is no Anderson-Rubin set, when there is none.
    endogeneity : EndogeneityTest or None
        Control-function test that price (and price x rotator) is exogenous.
    prepared : Prepared
        The absorbed design (effects, covariance choice).
    instruments : tuple of str
        Names of the excluded instruments used.
    """

    fit: IVFit
    form: str
    price_terms: tuple[str, ...]
    slope: np.ndarray
    slope_grad: np.ndarray
    elasticity: np.ndarray
    wrong_sign_share: float
    first_stage: tuple[FirstStage, ...]
    strength: Strength | None
    ar_set: ARSet | None
    ar_note: str
    endogeneity: EndogeneityTest | None
    prepared: Prepared
    instruments: tuple[str, ...]

    def coefficients(self) -> pd.DataFrame:
        """Coefficient table: estimate, standard error, z and p-value by name."""
        from scipy import stats

        se = self.fit.se
        z = np.divide(self.fit.params, se, out=np.full_like(se, np.nan), where=se > 0)
        return pd.DataFrame(
            {"estimate": self.fit.params, "se": se, "z": z, "p": 2 * stats.norm.sf(np.abs(z))},
            index=pd.Index(self.fit.names, name="term"),
        )


def _price_name(form: str) -> str:
    return "price" if form == "linear" else "log_price"


@dataclass(frozen=True, slots=True)
class DemandColumns:
    """The demand equation's raw columns (before fixed effects are absorbed).

    Attributes
    ----------
    price_name : str
        ``price`` or ``log_price``.
    data : dict of str to numpy.ndarray
        ``_y`` and every regressor and instrument, each (n,).
    exog, endog, instr : tuple of str
        Names in ``data`` of the exogenous regressors, the price terms and the
        excluded instruments.
    """

    price_name: str
    data: dict[str, np.ndarray]
    exog: tuple[str, ...]
    endog: tuple[str, ...]
    instr: tuple[str, ...]


def demand_columns(frame: pd.DataFrame, study: Study) -> DemandColumns:
    """Build the study's demand columns from the panel rows.

    Parameters
    ----------
    frame : pandas.DataFrame
        Panel rows.
    study : Study

    Returns
    -------
    DemandColumns
    """
    spec = study.demand
    p = frame[study.panel.price].to_numpy(dtype=float)
    q = frame[study.panel.quantity].to_numpy(dtype=float)
    price_name = _price_name(spec.form)
    y = q if spec.form == "linear" else np.log(q)
    x_price = p if spec.form == "linear" else np.log(p)

    data: dict[str, np.ndarray] = {"_y": y, price_name: x_price}
    endog = [price_name]
    for r in spec.rotators:
        name = f"{price_name}*{r}"
        data[name] = x_price * frame[r].to_numpy(dtype=float)
        endog.append(name)
    exog = [*spec.shifters, *spec.rotators]
    for c in exog:
        data[c] = frame[c].to_numpy(dtype=float)
    instr = list(spec.instruments)
    for w in spec.instruments:
        data[w] = frame[w].to_numpy(dtype=float)
    for r in spec.rotators:
        for w in spec.instruments:
            name = f"{w}*{r}"
            data[name] = frame[w].to_numpy(dtype=float) * frame[r].to_numpy(dtype=float)
            instr.append(name)
    return DemandColumns(price_name, data, tuple(exog), tuple(endog), tuple(instr))


def price_slope(coef: dict[str, float], price_name: str, rotators: dict[str, np.ndarray],
                p: np.ndarray, q: np.ndarray, form: str) -> tuple[np.ndarray, np.ndarray]:
    """Slope dQ/dP at every row, and the price coefficient per row.

    Parameters
    ----------
    coef : dict of str to float
        Demand coefficients by name (``price_name`` and ``price_name*rotator``).
    price_name : str
    rotators : dict of str to numpy.ndarray
        Each rotator's values, (n,).
    p, q : numpy.ndarray
        Price and quantity, (n,).
    form : str
        ``linear`` or ``log``.

    Returns
    -------
    (numpy.ndarray, numpy.ndarray)
        ``dQ/dP`` and the coefficient on the price term, each (n,).
    """
    b_price = np.zeros(len(p)) + coef[price_name]
    for r, rv in rotators.items():
        b_price = b_price + coef[f"{price_name}*{r}"] * rv
    slope = b_price if form == "linear" else b_price * q / p
    return slope, b_price


def estimate_demand(panel: Panel, study: Study, *, diagnostics: bool = True) -> DemandResult:
    """Estimate the study's demand equation.

    Parameters
    ----------
    panel : Panel
        The validated panel.
    study : Study
    diagnostics : bool
        Compute first-stage diagnostics and Hansen's J; False skips them
        (bootstrap replicates need only the estimates).

    Returns
    -------
    DemandResult
    """
    spec = study.demand
    f = panel.frame
    p = f[study.panel.price].to_numpy(dtype=float)
    q = f[study.panel.quantity].to_numpy(dtype=float)
    cols_in = demand_columns(f, study)
    price_name, data = cols_in.price_name, cols_in.data
    exog, endog, instr = list(cols_in.exog), list(cols_in.endog), list(cols_in.instr)

    prep = prepare(f, data, study, stage="demand", markets=panel.market_codes())
    cols = prep.columns
    n = len(f)
    exog_names = (["const"] if prep.constant else []) + exog
    exog_arr = np.column_stack(
        ([np.ones(n)] if prep.constant else []) + [cols[c] for c in exog]
    ) if exog_names else np.zeros((n, 0))
    endog_arr = np.column_stack([cols[c] for c in endog])
    instr_arr = np.column_stack([cols[c] for c in instr])
    names = tuple(exog_names + endog)
    proj = None
    if (spec.estimator == "2sls" and prep.cov.kind != "hac"  # the array path of fit_iv
            and instr_arr.shape[1] >= endog_arr.shape[1]  # else fit_iv says what is wrong
            and n - len(names) - prep.cov.df_penalty > 0):
        proj = Projection(*checked_design(exog_arr, endog_arr, instr_arr, names, tuple(instr)))
    fit = fit_iv(cols["_y"], exog_arr, endog_arr, instr_arr, names,
                 estimator=spec.estimator, cov=prep.cov, overid=diagnostics,
                 instrument_names=tuple(instr), projection=proj)

    # slope of Q in P at every observation, and its gradient in the coefficients
    rot = {r: f[r].to_numpy(dtype=float) for r in spec.rotators}
    slope, b_price = price_slope(dict(zip(names, fit.params, strict=True)), price_name,
                                 rot, p, q, spec.form)
    grad = np.zeros((n, fit.k))
    grad[:, names.index(price_name)] = 1.0
    for r, rv in rot.items():
        grad[:, names.index(f"{price_name}*{r}")] = rv
    if spec.form == "linear":
        elasticity = slope * p / q
    else:
        grad = grad * (q / p)[:, None]
        elasticity = b_price
    first = (first_stage_table(endog_arr, instr_arr, exog_arr, tuple(endog), prep.cov)
             if diagnostics else ())
    strength = None
    endogeneity = None
    ar_set = None
    ar_note = "not computed"
    if diagnostics:
        strength = stage_strength(endog_arr, instr_arr, exog_arr, first, prep.cov,
                                  f"the {price_name} coefficient")
        endogeneity = endogeneity_test(cols["_y"], exog_arr, endog_arr, instr_arr, prep.cov,
                                       projection=proj)
        if len(endog) > 1:
            ar_note = ("several endogenous regressors (price x rotator terms): the set is "
                       "reported for theta, not for the price coefficient")
        elif prep.cov.kind == "hac" or prep.cov.clusters2 is not None:
            ar_note = "not available with Newey-West or two-way clustered errors"
        else:
            try:
                ar_set = anderson_rubin_set(
                    cols["_y"], endog_arr[:, 0], instr_arr, exog_arr, prep.cov.kind,
                    clusters=prep.cov.clusters, level=study.inference.level,
                    df_absorbed=prep.cov.df_penalty)
                ar_note = ""
            except EstimationError as exc:
                ar_note = str(exc)
    return DemandResult(
        fit=fit,
        form=spec.form,
        price_terms=tuple(endog),
        slope=slope,
        slope_grad=grad,
        elasticity=elasticity,
        wrong_sign_share=float(np.mean(slope >= 0)),
        first_stage=first,
        strength=strength,
        ar_set=ar_set,
        ar_note=ar_note,
        endogeneity=endogeneity,
        prepared=prep,
        instruments=tuple(instr),
    )
