"""Verdicts on public survival datasets that lifelines ships, one row per unit.

``load_waltons``: lifespans of 163 fruit flies, 129 controls and 34 with the
miR-137 gene variant (median about 58 against 26 days; lifelines'
documentation uses it to show two clearly different survival curves).
``load_rossi``: 432 released prisoners followed for 52 weeks, 114 arrests
(Rossi, Berk and Lenihan 1980); financial aid (``fin``) lowers the arrest
hazard only marginally (Cox coefficient about -0.38, p about 0.06 in Fox's
appendix on Cox regression; from memory).

A strong difference between groups must be named as the cause with nothing
else broken (as cumulative counts per genotype, where the overdispersed
likelihood gains most, it must still come first); a marginal one and a
single cohort must not be called broken.
"""

from __future__ import annotations

import pandas as pd
import pytest

pytestmark = pytest.mark.slow


def _check(tmp_path, table: pd.DataFrame, settings):
    from workbench import api

    path = tmp_path / "units.csv"
    table.to_csv(path, index=False)
    return api.check("timing-curve", path, settings=settings, write=False, history=False)


def test_fly_genotypes_differ_in_timing_and_nothing_else_is_named(tmp_path, fast_settings):
    from lifelines.datasets import load_waltons

    flies = load_waltons()
    table = pd.DataFrame({"time": flies["T"].astype(float), "event": flies["E"], "cohort": flies["group"]})
    verdicts = _check(tmp_path, table, fast_settings).verdicts()
    broken = sorted(k for k, v in verdicts.items() if v == "broken")
    assert broken == ["cohort_homogeneity"], verdicts


def test_genotypes_in_cohort_counts_are_a_cohort_cause_that_the_catch_all_does_not_outrank(
        tmp_path, fast_settings):
    # The same flies as cumulative deaths at common ages per genotype (the 7
    # censored controls dropped, as the cohort layout cannot hold them). The
    # overdispersed likelihood gains most here (it absorbs any misfit of two
    # large cohorts), yet the genotype difference must stay a cause, named first.
    from lifelines.datasets import load_waltons
    from workbench import verdicts as verdict_rules

    flies = load_waltons()
    flies = flies[flies["E"] == 1]
    table = pd.DataFrame([{"cohort": g, "age": float(a), "exposed": len(d), "events": int((d["T"] <= a).sum())}
                          for g, d in flies.groupby("group") for a in range(10, 80, 10)])
    result = _check(tmp_path, table, fast_settings)
    ranked = {v.key: v for v in result.run.verdicts}
    cohort = ranked["cohort_homogeneity"]
    assert cohort.verdict == "broken" and not cohort.symptom_of, result.verdicts()
    broken = [v.key for v in result.run.verdicts if v.verdict == "broken"]
    assert broken[0] == "cohort_homogeneity", broken
    assert set(broken) <= {"cohort_homogeneity", "independent_units"}, broken
    line = verdict_rules.headline(result.run.verdicts)
    assert "Cohorts differ in timing" in line.partition("Next step:")[2], line
    # Two cohorts: every relaxation is judged by exact refits, and says so.
    relaxations = [f for f, _ in cohort.evidence if f.kind == "relaxation"]
    assert relaxations and all(f.numbers["elpd_method"] == "k-fold" for f in relaxations)
    assert all("only 2 cohorts to leave out" in f.detail for f in relaxations)


def test_a_marginal_group_effect_and_a_single_cohort_are_not_called_broken(tmp_path, fast_settings):
    from lifelines.datasets import load_rossi

    rossi = load_rossi()
    aid = pd.DataFrame({"time": rossi["week"].astype(float), "event": rossi["arrest"],
                        "cohort": rossi["fin"].map({0: "no_aid", 1: "aid"})})
    verdicts = _check(tmp_path, aid, fast_settings).verdicts()
    assert not [k for k, v in verdicts.items() if v == "broken"], verdicts
    one = _check(tmp_path, aid.drop(columns="cohort"), fast_settings).verdicts()
    assert not [k for k, v in one.items() if v == "broken"], one
    # One cohort cannot differ from others: unchecked, never holds or doubtful.
    assert one["cohort_homogeneity"] == "unchecked"


def test_fly_genotypes_with_their_own_curve_shapes_match_lifelines_per_genotype(tmp_path, fast_settings):
    # lifelines.WeibullFitter fitted to each genotype alone (its shipped
    # waltons dataset): with shape_by_group each group has its own scale and
    # shape, unpooled with two groups, so the posteriors must agree with the
    # per-genotype maximum-likelihood fits within posterior uncertainty.
    from lifelines import WeibullFitter
    from lifelines.datasets import load_waltons

    flies = load_waltons()
    table = pd.DataFrame({"time": flies["T"].astype(float), "event": flies["E"], "group": flies["group"]})
    path = tmp_path / "flies.csv"
    table.to_csv(path, index=False)
    from workbench import api

    result = api.check("timing-curve", path, options={"shape_by_group": "true"}, settings=fast_settings,
                       write=False, history=False)
    verdicts = result.verdicts()
    assert not [k for k, v in verdicts.items() if v == "broken"], verdicts
    # One cohort per group: nothing to compare within a group.
    assert verdicts["cohort_homogeneity"] == "unchecked"
    estimates = result.run.extras["parameters"]
    age_ref = result.run.data.extra["age_ref"]
    for genotype, flies_of in flies.groupby("group"):
        fitted = WeibullFitter().fit(flies_of["T"], flies_of["E"])
        shape, scale = estimates[f"shape[{genotype}]"], estimates[f"scale[{genotype}]"]
        assert abs(shape["mean"] - fitted.rho_) < 2 * shape["sd"], (genotype, shape, fitted.rho_)
        assert abs(scale["mean"] * age_ref - fitted.lambda_) < 2 * scale["sd"] * age_ref, (genotype, scale)


def test_a_censored_model_file_on_the_arrest_follow_up_is_not_broken(tmp_path, fast_settings):
    # The Weibull lifetime model file written with pm.Censored, on lifelines'
    # rossi table (weeks to first arrest, censored at 52 weeks for the 318
    # not arrested; time in tens of weeks for the file's priors). Its
    # replicates must be censored as the data were, or `predictions` would
    # call a fitting model broken. lifelines.WeibullFitter on the same table
    # gives the reference shape and scale.
    from pathlib import Path

    from lifelines import WeibullFitter
    from lifelines.datasets import load_rossi
    from workbench import api

    rossi = load_rossi()
    table = pd.DataFrame({"hours": rossi["week"] / 10.0, "failed": rossi["arrest"]})
    path = tmp_path / "arrests.csv"
    table.to_csv(path, index=False)
    model = Path(__file__).parent / "model_files" / "censored_lifetimes.py"
    result = api.check(str(model), path, settings=fast_settings, write=False, history=False)
    verdicts = result.verdicts()
    assert not [k for k, v in verdicts.items() if v == "broken"], verdicts
    assert verdicts["predictions"] != "broken"
    fitted = WeibullFitter().fit(table["hours"], table["failed"])
    estimates = result.run.extras["parameters"]
    for name, reference in (("alpha", fitted.rho_), ("beta", fitted.lambda_)):
        assert abs(estimates[name]["mean"] - reference) < 2 * estimates[name]["sd"], (name, estimates[name], reference)
