"""Cluster dimensions chosen in the study file: by a named column, or two ways."""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

import conduct
from conduct.cli import main
from conduct.presets import write_study
from conduct.simulate import SimulationSpec


@pytest.fixture()
def study(tmp_path):
    return write_study(tmp_path / "c", SimulationSpec(markets=16, periods=16, seed=9))


def test_named_cluster_column_equals_market_clusters(study):
    base = conduct.estimate(study)
    panel = pd.read_csv(study.parent / "panel.csv")
    panel["authority"] = "A-" + panel["region"].astype(str)  # one authority per region
    panel.to_csv(study.parent / "panel.csv", index=False)
    text = study.read_text().replace('errors = "cluster"',
                                     'errors = "cluster"\ncluster = ["authority"]')
    study.write_text(text)
    named = conduct.estimate(study)
    assert named.supply.se == pytest.approx(base.supply.se, rel=1e-10)
    np.testing.assert_allclose(named.demand.fit.cov, base.demand.fit.cov, rtol=1e-10)


def test_two_way_clustering_runs_end_to_end(study, capsys):
    text = study.read_text().replace('errors = "cluster"',
                                     'errors = "cluster"\ncluster = ["market", "period"]')
    study.write_text(text)
    assert main(["estimate", str(study), "--json"]) == 0
    out = capsys.readouterr().out
    assert "two-way cluster-robust" in out
    res = conduct.estimate(study)
    assert res.supply.se > 0 and np.isfinite(res.supply.se)
    assert all(fs.f > 0 for fs in res.demand.first_stage)


def test_cluster_needs_cluster_errors(study, capsys):
    text = study.read_text().replace('errors = "cluster"',
                                     'errors = "robust"\ncluster = ["period"]')
    study.write_text(text)
    assert main(["check", str(study)]) == 2
    assert "demand.cluster" in capsys.readouterr().err
