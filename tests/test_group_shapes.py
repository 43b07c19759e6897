"""Groups of cohorts: automatic pooling, and curves that may differ in shape by group."""

from __future__ import annotations

import json

import numpy as np
import pandas as pd
import pytest

from workbench import registry
from workbench.cli import main
from workbench.recipe import make_design

# Invented: two nurseries sow the same seed; at one the seedlings come up in a
# bunch (Weibull shape 3.5), at the other spread out (shape 1.0), with the same
# timing scale (relative to the median look) and 85% of seeds viable.
TRUE_SHAPES = [1.0, 3.5]
TRUTH = {"scale": [0.8, 0.8], "shape": TRUE_SHAPES, "eventual": 0.85}
AGES = [1.0, 2, 3, 4, 6, 8, 11, 15]
# Two chains are enough for the shapes' intervals and the LOO gap at this size.
SAMPLING = ["--draws=300", "--tune=300", "--chains=2"]


def grouped_table(seed: int = 5, cohorts_per_group: int = 6) -> pd.DataFrame:
    recipe = registry.load().get("timing-curve")
    rows = [{"cohort": f"{g}-{c:02d}", "group": g, "age": a, "exposed": 150, "events": 0}
            for g in ("east", "west") for c in range(cohorts_per_group) for a in AGES]
    options = recipe.read_options({"family": "weibull", "shape_by_group": "true"})
    data = recipe.validate(pd.DataFrame(rows), options)
    simulated = recipe.simulate(np.random.default_rng(seed), data, TRUTH, options)
    return simulated.to_frame()[["cohort", "group", "age", "exposed", "events"]]


@pytest.mark.parametrize("recipe_name, options", [
    ("timing-curve", {"family": "weibull", "shape_by_group": "true"}),
    ("competing-risks", {"outcomes": "events,lost", "shape_by_group": "true"}),
])
def test_two_groups_get_no_hierarchy_to_diverge_in(recipe_name, options):
    # With two groups a group-level sd rests on one difference and its
    # posterior is the prior's, a funnel (Gelman 2006): automatic pooling keeps
    # the groups apart, for the scale and the shape alike.
    table = grouped_table()
    if recipe_name == "competing-risks":
        table = table.assign(lost=0)
    design = make_design(registry.load().get(recipe_name), options, {})
    data = design.validate(table)
    assert data.extra["pooling"] == "none"
    model = design.build(data)
    free = {rv.name for rv in model.free_RVs}
    assert not free & {"scale_sd", "shape_sd", "scale_offset", "shape_offset"}
    assert model.named_vars_to_dims["shape"][0] == "group"


def test_three_groups_pool_the_shape_partially_like_the_scale():
    table = grouped_table()
    table.loc[table["cohort"].str.endswith(("04", "05")), "group"] = "north"
    design = make_design(registry.load().get("timing-curve"), {"shape_by_group": "true"}, {})
    model = design.build(design.validate(table))
    free = {rv.name for rv in model.free_RVs}
    assert {"scale_sd", "shape_sd", "scale_offset", "shape_offset"} <= free
    assert model.named_vars_to_dims["shape_group"] == ("group",)
    assert len(model.coords["group"]) == 3


def test_groups_simulated_with_their_own_shapes_show_them():
    # Share of a group's eventual events by the first look: the bunched group
    # (shape 3.5) has hardly started, the spread-out one has.
    table = grouped_table(cohorts_per_group=20)
    first = table[table["age"] == AGES[0]].groupby("group")["events"].sum()
    last = table[table["age"] == AGES[-1]].groupby("group")["events"].sum()
    early = first / last
    assert early["east"] > 3 * early["west"]


@pytest.mark.parametrize("extra, fragment", [
    (["--set", "shape_by_group=maybe"], "option 'shape_by_group': expected true to let groups differ"),
    (["--set", "shape_by_group=true", "--set", "pooling=complete"],
     "option 'shape_by_group=true' needs groups with their own timing"),
])
def test_a_bad_shape_by_group_gives_one_line_and_exit_2(tmp_path, capsys, extra, fragment):
    path = tmp_path / "t.csv"
    grouped_table().to_csv(path, index=False)
    code = main(["check", "timing-curve", "--data", str(path), "--out", str(tmp_path / "out"), *extra])
    err = capsys.readouterr().err.strip()
    assert code == 2 and fragment in err and len(err.splitlines()) == 1


def test_shape_by_group_without_groups_is_refused(tmp_path, capsys):
    path = tmp_path / "t.csv"
    grouped_table().drop(columns="group").to_csv(path, index=False)
    code = main(["check", "timing-curve", "--data", str(path), "--out", str(tmp_path / "out"),
                 "--set", "shape_by_group=true"])
    err = capsys.readouterr().err.strip()
    assert code == 2 and "found 1 group(s) and pooling complete" in err and len(err.splitlines()) == 1


@pytest.mark.slow
def test_compare_prefers_group_shapes_and_recovers_them(tmp_path):
    path = tmp_path / "nurseries.csv"
    grouped_table().to_csv(path, index=False)
    out = tmp_path / "compare"
    code = main(["compare", "--data", str(path), "timing-curve:shape_by_group=true", "timing-curve",
                 "--out", str(out), "--no-relax", "--no-cache", "--quiet", "--seed", "3",
                 "--history", str(tmp_path / "h.sqlite"), *SAMPLING])
    assert code == 0
    doc = json.loads((out / "compare.json").read_text())
    first, second = doc["comparison"]
    assert first["design"].lower() == "timing-curve:shape_by_group=true"
    assert not second["level_with_best"] and second["gap"] > 2 * second["gap_se"]
    # The chosen design's estimates: each group's shape within its 90% interval.
    # Measured on tables of seeds 4-8 (2 chains of 300 draws): the truth lay
    # inside 9 of the 10 intervals (shape 1.0 once just below, at 1.007); seed 5
    # put both well inside (0.95-1.07 and 3.28-3.60).
    summaries = list(out.glob("designs/*/summary.json"))
    chosen = next(s for s in map(lambda p: json.loads(p.read_text()), summaries)
                  if str(s["design"].get("shape_by_group")).lower() == "true")
    for group, truth in zip(("east", "west"), TRUE_SHAPES):
        estimate = chosen["parameters"][f"shape[{group}]"]
        assert estimate["low"] < truth < estimate["high"]
