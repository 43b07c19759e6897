"""Parameter estimates: which posterior variables enter, how they are named, and the
true values a demo shows beside them."""

from __future__ import annotations

import json
from types import SimpleNamespace

import arviz as az
import numpy as np
import pytest
import xarray as xr

from workbench import estimates
from workbench.report import html as report_html

CHAINS, DRAWS = 2, 200


def _tree() -> xr.DataTree:
    """A small posterior: a scalar, a vector over named outcomes, a per-row quantity,
    a fixed element and a copy of the scalar."""
    rng = np.random.default_rng(3)
    size = (CHAINS, DRAWS)
    spread = rng.normal(0.03, 0.002, size)
    scale = np.stack([rng.normal(2.0, 0.1, size), rng.normal(5.0, 0.3, size)], axis=-1)
    share = np.stack([rng.uniform(0.2, 0.4, size), np.ones(size)], axis=-1)
    posterior = xr.Dataset(
        {"spread": (("chain", "draw"), spread),
         "scale": (("chain", "draw", "outcome"), scale),
         "share": (("chain", "draw", "outcome"), share),
         "spread_group": (("chain", "draw", "group"), spread[..., None]),
         "p": (("chain", "draw", "row"), rng.uniform(size=(*size, 5)))},
        coords={"outcome": ["solved", "lost"], "group": ["all"]})
    log_prior = xr.Dataset({"spread": (("chain", "draw"), np.zeros(size)),
                            "scale": (("chain", "draw", "outcome"), np.zeros((*size, 2)))},
                           coords={"outcome": ["solved", "lost"]})
    observed = xr.Dataset({"y": (("row",), np.arange(5))})
    return xr.DataTree.from_dict({"posterior": posterior, "log_prior": log_prior,
                                  "observed_data": observed})


@pytest.fixture(scope="module")
def tree():
    return _tree()


@pytest.fixture(scope="module")
def table(tree):
    return estimates.parameters(tree)


def test_vector_parameters_are_named_by_their_coordinate_labels(table):
    assert {"scale[solved]", "scale[lost]"} <= set(table)


def test_every_estimate_carries_the_contract_fields(table):
    for entry in table.values():
        assert set(entry) == {"mean", "sd", "low", "high", "rhat", "ess_bulk", "ess_tail"}


def test_estimates_equal_arviz_on_the_same_draws(tree, table):
    # Reference library: ArviZ's summary (rank-normalised split R-hat, Vehtari et al. 2021).
    scale = tree["posterior"]["scale"].sel(outcome="lost")
    draws = scale.values.ravel()
    assert table["scale[lost]"]["mean"] == pytest.approx(draws.mean(), rel=1e-12)
    assert table["scale[lost]"]["low"] == pytest.approx(np.quantile(draws, 0.05), rel=1e-3)
    assert table["scale[lost]"]["high"] == pytest.approx(np.quantile(draws, 0.95), rel=1e-3)
    rhat = az.rhat(tree["posterior"].to_dataset()[["scale"]])["scale"].sel(outcome="lost")
    assert table["scale[lost]"]["rhat"] == pytest.approx(float(rhat), rel=1e-9)


def test_quantities_with_one_value_per_data_row_are_left_out(table):
    assert not any(label.startswith("p[") for label in table)


def test_an_element_that_cannot_vary_is_left_out(table):
    assert "share[solved]" in table and "share[lost]" not in table


def test_an_element_repeating_another_is_shown_once(table):
    assert "spread" in table and "spread_group[all]" not in table


def test_true_values_pair_with_elements_in_row_major_order(tree, table):
    truth = estimates.beside_truth(tree, table, {"scale": [2.0, 5.0], "spread": 0.03, "story": "text"})
    assert truth == {"scale[solved]": 2.0, "scale[lost]": 5.0, "spread": 0.03}


def test_a_true_value_of_another_shape_is_not_paired(tree, table):
    assert estimates.beside_truth(tree, table, {"scale": [1.0, 2.0, 3.0]}) == {}


def test_a_true_value_outside_the_interval_is_marked(tree, table):
    run = SimpleNamespace(fit=SimpleNamespace(idata=tree))
    rows = {r["label"]: r for r in report_html.estimate_rows(run, {"parameters": table},
                                                             {"scale": [2.0, 9.0]})}
    assert rows["scale[solved]"]["outside"] is False
    assert rows["scale[lost]"]["outside"] is True
    assert rows["spread"]["truth"] is None


def test_the_demo_hands_its_true_values_to_the_report(tmp_path, monkeypatch):
    from workbench import api, demo

    seen = {}
    monkeypatch.setattr(api, "check", lambda *args, **kwargs: seen.update(kwargs))
    demo.run("threshold-geometry", out=tmp_path / "demo")
    written = json.loads((tmp_path / "demo" / "demo-truth.json").read_text())
    assert seen["truth"] == written["truth"]


def test_elements_of_a_two_dimensional_effect_are_labelled_by_their_coordinates():
    # Prior checks and calibration name an element as the parameter table does.
    from workbench import calibration
    from workbench.checks import prior

    coords = {"move": ["larva>spat", "spat>lost"], "covariate": ["temp_c", "feed=paste"]}
    truth = np.arange(4.0).reshape(2, 2)
    labels = [label for label, _, _ in calibration._elements(
        "move_effect", truth, np.zeros((10, 2, 2)), ("move", "covariate"), coords)]
    assert labels == ["move_effect[larva>spat, temp_c]", "move_effect[larva>spat, feed=paste]",
                      "move_effect[spat>lost, temp_c]", "move_effect[spat>lost, feed=paste]"]
    # Without coordinates the positions stand in.
    assert estimates.labels_by_coords("b", None, {}, (2,)) == ["b[0]", "b[1]"]
    tree = xr.DataTree.from_dict({"posterior": xr.Dataset(
        {"move_effect": (("chain", "draw", "move", "covariate"), np.zeros((1, 3, 2, 2)))}, coords=coords)})
    assert prior._element_label(tree, "move_effect", 2, 4) == "move_effect[spat>lost, temp_c]"
    assert prior._element_label(tree, "move_effect", 0, 1) == "move_effect"
