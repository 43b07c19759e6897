"""`workbench compare` of designs with and without covariates on one table.

A design's covariates are a comma list inside one ``KEY=VALUE`` piece
(``timing-curve:covariates=dose,site``); the comma belongs to the value, the
colon separates pieces.
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from workbench import plans
from workbench.cli import main
from workbench.compare import slug

WITH_BOTH = "timing-curve:eventual=all:covariates=dose,site"
WITHOUT = "timing-curve:eventual=all"
# Invented true values: each sd of dose halves the time to the event, site b
# lengthens it by 30%; Weibull timing, shape 1.6, every unit has the event.
TIME_RATIO = {"dose": 0.5, "site=b": 1.3}


def test_a_comma_list_stays_one_option_value():
    spec = plans.parse_design(WITH_BOTH)
    assert spec.options == {"eventual": "all", "covariates": "dose,site"}
    assert spec.text() == WITH_BOTH


def test_designs_whose_labels_differ_only_by_a_comma_get_their_own_folders():
    assert slug("timing-curve:covariates=a,b") != slug("timing-curve:covariates=a_b")
    assert slug("timing-curve") == "timing-curve"


@pytest.mark.parametrize("design, expected", [
    ("timing-curve:covariates=dose:covariates=site",
     "expected each option once; found 'covariates' twice (a list value takes commas: covariates=a,b)"),
    ("timing-curve:covariates=dose,,site", "(a column name between every two commas)"),
    ("timing-curve:covariates=dose:site", "expected KEY=VALUE or PARAM~DIST(ARGS) after 'timing-curve'; "
                                          "found 'site'"),
])
def test_a_malformed_covariate_list_exits_2_with_one_line(tmp_path, capsys, design, expected):
    path = tmp_path / "t.csv"
    path.write_text("time,event,dose,site\n1,1,0.5,a\n2,0,1.5,b\n3,1,1.0,a\n")
    code = main(["compare", "--data", str(path), design, WITHOUT, "--out", str(tmp_path / "out"), "--quiet"])
    err = capsys.readouterr().err
    assert code == 2 and expected in err and err.count("\n") == 1


@pytest.fixture(scope="module")
def compared(tmp_path_factory):
    from recipes.timing_curve import RECIPE

    folder = tmp_path_factory.mktemp("covariates")
    rng = np.random.default_rng(12)
    n = 200
    frame = pd.DataFrame({"time": rng.uniform(3.0, 6.0, n), "event": 0, "dose": rng.normal(0.0, 1.0, n),
                          "site": rng.choice(["a", "b"], n)})
    frame.loc[0, "event"] = 1  # a valid skeleton; the simulator draws every outcome
    options = RECIPE.read_options({"eventual": "all", "covariates": "dose,site"})
    data = RECIPE.validate(frame, options)
    design = data.extra["covariates"]
    truth = {"scale": 1.0, "shape": 1.6,
             "time_effect": np.log([TIME_RATIO[e] for e in design.effects]) * design.per_unit}
    sim = RECIPE.simulate(rng, data, truth, options)
    path = folder / "units.csv"
    frame.assign(time=sim["time"], event=sim["code"]).to_csv(path, index=False)
    out = folder / "compare"
    code = main(["compare", "--data", str(path), WITHOUT, WITH_BOTH, "--out", str(out),
                 "--no-relax", "--quiet", "--seed", "3", "--cache", str(folder / "cache"),
                 "--history", str(folder / "history.sqlite"), "--draws", "200", "--tune", "200"])
    return code, out


def test_the_design_with_the_true_covariates_ranks_first(compared):
    code, out = compared
    assert code == 0
    doc = json.loads((out / "compare.json").read_text())
    assert [row["design"] for row in doc["comparison"]] == [WITH_BOTH, WITHOUT]
    assert doc["best"] == WITH_BOTH
    # Dose halves the time per sd: leaving it out costs more than two SE
    # (measured, seed 3: a gap of 48.9 with SE 8.4).
    without = doc["comparison"][1]
    assert not without["level_with_best"] and without["gap"] > 2 * without["gap_se"]
    # Each design has its own report.
    assert len(list((out / "designs").glob("*/report.html"))) == 2
