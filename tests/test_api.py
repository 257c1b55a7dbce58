"""The Python API: estimate() returns frozen results with readable text and HTML."""

from __future__ import annotations

import dataclasses

import pandas as pd
import pytest

import conduct
from conduct.presets import write_study
from conduct.simulate import SimulationSpec


@pytest.fixture(scope="module")
def res(tmp_path_factory):
    spec = SimulationSpec(markets=10, periods=12, seed=3, title="<b>Salt & co</b>")
    return conduct.estimate(write_study(tmp_path_factory.mktemp("api"), spec))


def test_results_are_frozen_with_pandas_tables(res):
    with pytest.raises(dataclasses.FrozenInstanceError):
        res.supply = None  # type: ignore[misc]
    assert isinstance(res.derived.observations, pd.DataFrame)
    assert isinstance(res.demand.coefficients(), pd.DataFrame)
    assert isinstance(res.supply.coefficients(), pd.DataFrame)
    assert "theta" in repr(res)


def test_summary_text_and_html(res):
    text = res.summary()
    assert "theta =" in text and "verdict:" in text
    html = res._repr_html_()
    assert "<b>Salt" not in html and "&lt;b&gt;Salt &amp; co&lt;/b&gt;" in html
    assert "not a legal finding" in html
    assert "http" not in html
