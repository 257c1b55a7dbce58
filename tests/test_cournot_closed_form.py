"""End to end on panels built from the symmetric N-firm Cournot closed form.

Linear inverse demand P = a - b Q and constant marginal cost c give, with N
symmetric quantity-setting firms, P = (a + N c)/(N + 1) and
Q = N (a - c) / ((N + 1) b) (Tirole 1988, *The Theory of Industrial
Organization*, sec. 5.4; textbook result, from memory).  The industry supply
relation is then P = c + (1/N) Q / |dQ/dP| with dQ/dP = -1/b, so the conduct
parameter is theta = 1/N.
"""

from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd
import pytest

import conduct
from conduct.cli import main

STUDY = """title = "closed-form Cournot"
[panel]
file = "panel.csv"
market = "region"
period = "quarter"
price = "price"
quantity = "tonnes"
sellers = "sellers"
[demand]
shifters = ["income"]
instruments = ["diesel"]
effects = ["market"]
[supply]
cost_shifters = ["diesel"]
cost_slope = false
"""


def cournot_panel(path: Path, n_sellers, *, markets: int = 30, periods: int = 30,
                  b: float = 0.5, seed: int = 0) -> Path:
    """Write a closed-form Cournot panel and its study file; return the study path."""
    rng = np.random.default_rng(seed)
    m = np.repeat(np.arange(markets), periods)
    t = np.tile(np.arange(periods), markets)
    n = np.asarray(n_sellers(m) if callable(n_sellers) else np.full(m.size, n_sellers))
    income = rng.uniform(0, 2, m.size)
    diesel = rng.uniform(0, 2, m.size)
    a = 20 + 3 * income + 0.4 * (m % 7) + rng.normal(0, 0.5, m.size)  # demand shock
    c = 2 + 2 * diesel + rng.normal(0, 0.3, m.size)  # cost shock
    price = (a + n * c) / (n + 1)
    q = n * (a - c) / ((n + 1) * b)
    frame = pd.DataFrame({"region": m, "quarter": 2000 + t, "price": price, "tonnes": q,
                          "sellers": n, "income": income, "diesel": diesel})
    frame.to_csv(path / "panel.csv", index=False)
    (path / "study.toml").write_text(STUDY)
    return path / "study.toml"


@pytest.mark.parametrize("n_sellers", [2, 4])
def test_theta_recovers_one_over_n(tmp_path, n_sellers):
    res = conduct.estimate(cournot_panel(tmp_path, n_sellers, seed=n_sellers))
    s = res.supply
    assert s is not None
    assert s.theta == pytest.approx(1 / n_sellers, abs=3 * s.se)
    assert s.ci[0] < 1 / n_sellers < s.ci[1]
    # the demand slope -1/b is recovered and elasticities follow from it
    assert res.demand.fit.coef("price") == pytest.approx(-2.0, rel=0.05)
    assert s.verdict == "cournot"
    # Lerner = theta / |elasticity| at every observation (Cowling & Waterson 1976)
    obs = res.derived.observations
    np.testing.assert_allclose(obs["lerner_estimated"], s.theta / np.abs(obs["elasticity"]),
                               rtol=1e-10)


def test_varying_sellers_cournot_benchmark(tmp_path):
    study = cournot_panel(tmp_path, lambda m: 2 + m % 5, seed=11)
    res = conduct.estimate(study)
    s = res.supply
    assert s is not None
    tests = {t.name: t for t in s.tests}
    assert not tests["cournot"].rejected
    assert tests["competitive"].rejected and tests["collusive"].rejected
    assert s.cournot_benchmark is not None
    assert abs(s.theta - s.cournot_benchmark) < 3 * s.se


def test_cli_estimate_writes_run_folder(tmp_path, capsys):
    study = cournot_panel(tmp_path, 3, markets=20, periods=20, seed=2)
    assert main(["estimate", str(study), "--json"]) == 0
    printed = json.loads(capsys.readouterr().out)
    folders = [p for p in (tmp_path / "runs").iterdir() if p.is_dir()]
    assert len(folders) == 1
    written = json.loads((folders[0] / "summary.json").read_text())
    assert written == printed
    for key in ("data", "demand", "conduct", "menu", "costs", "warnings"):
        assert key in written
    assert {"sha256", "rows", "markets", "periods", "first_period", "last_period",
            "dropped_rows"} <= set(written["data"])
    assert written["conduct"]["verdict"] in {"competitive", "cournot", "collusive",
                                             "inconclusive"}
    obs = pd.read_csv(folders[0] / "observations.csv")
    assert len(obs) == 400
    for col in ("elasticity", "marginal_cost_estimated", "lerner_estimated",
                "marginal_cost_cournot", "lerner_collusive"):
        assert col in obs.columns
    # a second run never overwrites the first
    assert main(["estimate", str(study), "--quiet"]) == 0
    assert len([p for p in (tmp_path / "runs").iterdir() if p.is_dir()]) == 2
    assert capsys.readouterr().out == ""


def test_demand_only_study(tmp_path, capsys):
    study = cournot_panel(tmp_path, 3, markets=15, periods=15, seed=4)
    text = study.read_text().split("[supply]")[0]
    study.write_text(text)
    assert main(["estimate", str(study), "--json"]) == 0
    out = json.loads(capsys.readouterr().out)
    assert out["conduct"] is None and out["costs"] is None
    price = out["demand"]["coefficients"]["price"]
    assert abs(price["estimate"] + 2.0) < 3 * price["se"]
