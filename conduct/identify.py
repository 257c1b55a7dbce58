"""Is the conduct parameter identified by the specification?  Checked before estimating.

Linear demand without rotators and a marginal cost free to rise with output
leaves theta unidentified (Bresnahan 1982; Lau 1982): a demand shift moves
price and quantity along a line that either a steeper cost or more market
power explains equally well.  Only a rotation of demand (a variable that
changes the slope dQ/dP) separates the two, or an assumption that marginal
cost is constant.  Log-linear demand without rotators is identified only
through its functional form.
"""

from __future__ import annotations

from dataclasses import dataclass

from conduct.errors import IdentificationError
from conduct.study import Study

__all__ = ["Identification", "check_identification", "supply_instruments"]


@dataclass(frozen=True, slots=True)
class Identification:
    """Outcome of the identification check.

    Attributes
    ----------
    identified : bool or None
        None for demand-only studies.
    reason : str
        One paragraph explaining what identifies theta (or why it is not).
    warnings : tuple of str
        Caveats that do not stop estimation.
    mode : str
        ``supply`` (theta from the supply relation with Q*) or ``regime-shift``
        (conduct relative to a base regime, log demand without rotators).
    """

    identified: bool | None
    reason: str
    warnings: tuple[str, ...]
    mode: str = "supply"


def supply_instruments(study: Study) -> tuple[str, ...]:
    """Excluded instruments of the supply relation, by name.

    Demand shifters, rotators, shifter x rotator products, then the study's
    extra supply instruments; variables that are also cost shifters are included
    in the supply relation and therefore not excluded from it.
    """
    d = study.demand
    costs = set(study.supply.cost_shifters) if study.supply is not None else set()
    names = [c for c in (*d.shifters, *d.rotators) if c not in costs]
    names += [f"{x}*{r}" for r in d.rotators for x in d.shifters
              if x not in costs or r not in costs]
    if study.supply is not None:
        names += [c for c in study.supply.instruments if c not in names]
    return tuple(names)


def check_identification(study: Study) -> Identification:
    """Check, from the specification alone, whether theta can be identified.

    Parameters
    ----------
    study : Study

    Returns
    -------
    Identification

    Raises
    ------
    IdentificationError
        When the specification cannot identify theta; the message explains why
        and names the remedies.
    """
    if study.supply is None:
        return Identification(None, "demand-only study: no conduct parameter is estimated.", ())
    d, s = study.demand, study.supply
    warnings: list[str] = []
    if d.form == "linear" and not d.rotators and s.cost_slope:
        raise IdentificationError(
            f"Study file {study.path}: theta is not identified. With linear demand and no "
            "rotator, shifting demand traces the same price-quantity path whether marginal "
            "cost rises with output or firms exercise market power (Bresnahan 1982; Lau "
            "1982). Remedies: add a rotator under [demand] rotators (a variable that changes "
            "how price-sensitive demand is), or assume constant marginal cost with "
            "cost_slope = false under [supply]."
        )
    instruments = supply_instruments(study)
    if d.form == "log" and not d.rotators:
        if not s.regimes:
            raise IdentificationError(
                f"Study file {study.path}: with log-linear demand and no rotator, theta is "
                "identified only by the functional form of demand: the markup Q/|dQ/dP| = "
                "P/|elasticity| moves one-for-one with price, so market power and the level "
                "of marginal cost cannot be told apart. Remedies: add a rotator under [demand] "
                "rotators, or name a column of known conduct regimes under [supply] regimes "
                "(conduct is then compared across regimes, as in Porter 1983)."
            )
        if s.cost_slope and not instruments:
            raise IdentificationError(
                f"Study file {study.path}: the log supply relation has ln Q as an endogenous "
                "regressor but no excluded instrument; add a demand shifter that does not "
                "shift cost, or list one under [supply] instruments."
            )
        return Identification(
            True,
            f"identified by the known regimes in '{s.regimes}': conduct in each regime "
            "relative to the base regime, from the regime's price effect in a log supply "
            "relation (Porter 1983)",
            ("Log-linear demand without rotators: only conduct relative to the base regime "
             "(taken as theta = 0) is identified; the level of theta is not.",),
            mode="regime-shift",
        )
    n_endog = 2 if s.cost_slope else 1
    if len(instruments) < n_endog:
        endog = "Q* (the markup regressor)" + (" and Q" if s.cost_slope else "")
        raise IdentificationError(
            f"Study file {study.path}: the supply relation has {n_endog} endogenous "
            f"regressor(s), {endog}, but only {len(instruments)} excluded instrument(s) "
            f"({', '.join(instruments) or 'none'}). Demand shifters and rotators are the "
            "natural instruments: add them under [demand] shifters/rotators, or list extra "
            "ones under [supply] instruments."
        )
    if d.rotators:
        reason = (f"identified by the demand rotation through {', '.join(d.rotators)} "
                  "(Bresnahan 1982; Lau 1982)")
    else:
        reason = "identified by demand shifts under the assumption of constant marginal cost"
    return Identification(True, reason, tuple(warnings))
