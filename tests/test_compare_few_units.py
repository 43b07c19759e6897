"""`workbench compare` over a handful of cohorts: exact refits rank the designs, not PSIS-LOO.

With three cohorts whose cells form one likelihood term each, PSIS-LOO's
difference is a sum of three terms and its SE rests on nothing (Sivula et
al. 2022); the remedy is to refit without each unit (Vehtari, Gelman and
Gabry 2017, sec. 2.3).
"""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

import shared_runs

from workbench.compare import SMALL_DIFFERENCE, statement


@pytest.fixture(scope="module")
def three_cohorts(tmp_path_factory) -> tuple[int, dict]:
    from recipes.timing_curve import RECIPE
    from workbench.cli import main

    folder = tmp_path_factory.mktemp("few")
    ages = [2.0, 4.0, 7.0, 10.0, 14.0, 20.0, 30.0]
    skeleton = pd.DataFrame([{"cohort": f"c{c}", "age": a / 10.0, "exposed": 300, "events": 0}
                             for c in range(3) for a in ages])
    options = RECIPE.read_options({"family": "weibull", "eventual": "estimate"})
    data = RECIPE.validate(skeleton, options)
    table = RECIPE.simulate(np.random.default_rng(3), data, shared_runs.TIMING_TRUTH, options).to_frame()
    path = folder / "three.csv"
    table[["cohort", "age", "exposed", "events"]].to_csv(path, index=False)
    out = folder / "compare"
    code = main(["compare", "--data", str(path), shared_runs.TRUE_DESIGN, shared_runs.WRONG_DESIGN,
                 "--out", str(out), "--no-relax", "--quiet", "--seed", "4", "--cache", str(folder / "cache"),
                 "--history", str(folder / "history.sqlite"), "--draws", "400", "--tune", "400"])
    return code, json.loads((out / "compare.json").read_text()) if code == 0 else {}, out


def test_three_cohorts_are_ranked_by_exact_refits_and_say_why(three_cohorts):
    code, doc, out = three_cohorts
    assert code == 0
    assert doc["elpd_method"] == "k-fold"
    assert doc["unit"] == "cohort"
    assert "only 3 cohorts" in doc["why"]
    assert "exact refits" in doc["statement"] and "only 3 cohorts" in doc["statement"]
    assert "exact refits" in (out / "compare.html").read_text()
    assert len(doc["pointwise"]["x"]) == 3


def test_with_three_cohorts_the_gap_alone_decides(three_cohorts):
    # A fifth of the units never have the event (eventual 0.6): the design that
    # forces everyone to have it misses each cohort's plateau by far more than 4.
    _, doc, _ = three_cohorts
    best, other = doc["comparison"]
    assert best["design"].endswith("eventual=estimate")
    assert other["gap"] > SMALL_DIFFERENCE and not other["level_with_best"]
    assert doc["best"] == best["design"]
    assert "the gap alone decides" in doc["statement"]
    assert "SE of the gap means nothing" in other["caution"]


def test_k_fold_elpd_is_the_sum_of_held_out_densities_and_p_the_in_sample_excess(three_cohorts):
    _, doc, _ = three_cohorts
    for row in doc["comparison"]:
        pointwise = np.asarray(doc["pointwise"]["elpd"][row["design"]])
        assert row["elpd"] == pytest.approx(pointwise.sum())
        assert row["elpd_se"] == pytest.approx(np.sqrt(3 * np.var(pointwise)))
        # The full fit predicts its own data at least as well as held-out fits do.
        assert row["p_loo"] > 0


def test_a_small_gap_over_few_units_keeps_the_top_open_whatever_its_se():
    rows = [{"design": "A", "gap": 0.0, "gap_se": 0.0, "level_with_best": True, "high_k_rows": [],
             "stacking_weight": 0.6},
            {"design": "B", "gap": 3.0, "gap_se": 0.2, "level_with_best": True, "high_k_rows": [],
             "stacking_weight": 0.4}]
    text, winner = statement(rows, refits="only 3 cohorts to leave out", few=True)
    assert winner is None and text.startswith("No clear winner")
    assert "exact refits" in text
