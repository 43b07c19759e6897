"""`workbench compare`: the true design wins with its uncertainty stated; close calls stay open."""

from __future__ import annotations

import json
import warnings

import numpy as np
import pytest

import shared_runs
from workbench import engine, plans
from workbench.compare import SE_MULTIPLE, statement, too_close_to_call
from workbench.errors import OptionError


@pytest.fixture(scope="module")
def compared():
    code, folder = shared_runs.comparison()
    assert code == 0
    return folder


@pytest.fixture(scope="module")
def doc(compared):
    return json.loads((compared / "compare.json").read_text())


def label(spec: str) -> str:
    """The label the workbench gives a design spec."""
    from workbench.api import resolve_design

    s = plans.parse_design(spec)
    return resolve_design(s.target, s.options, s.priors).label()


# --- the comparison on data simulated from one of the designs ------------------------------------


def test_data_simulated_from_a_design_rank_it_first_beyond_two_standard_errors(doc):
    true, wrong = label(shared_runs.TRUE_DESIGN), label(shared_runs.WRONG_DESIGN)
    first, second = doc["comparison"]
    assert first["design"] == true and second["design"] == wrong
    assert doc["best"] == true
    assert second["gap"] > SE_MULTIPLE * second["gap_se"] > 0


def test_the_statement_gives_the_difference_with_its_standard_error(doc):
    second = doc["comparison"][1]
    assert doc["statement"].startswith(f"{doc['best']} predicts best")
    assert f"{second['gap']:.1f} (SE {second['gap_se']:.1f})" in doc["statement"]


def test_stacking_weights_favour_the_true_design_and_sum_to_one(doc):
    weights = {r["design"]: r["stacking_weight"] for r in doc["comparison"]}
    assert sum(weights.values()) == pytest.approx(1.0)
    assert weights[doc["best"]] > 0.5


def test_difference_standard_error_is_that_of_the_pointwise_differences(doc):
    # Vehtari, Gelman and Gabry (2017), eq. 24: se(elpd_diff) = sqrt(n V(diff_i)).
    # ArviZ uses the variance with divisor n; the paper's n - 1 differs by
    # sqrt(n / (n - 1)) = 3% at n = 16, inside the tolerance.
    first, second = doc["comparison"]
    a = np.asarray(doc["pointwise"]["elpd"][first["design"]])
    b = np.asarray(doc["pointwise"]["elpd"][second["design"]])
    assert second["gap"] == pytest.approx(a.sum() - b.sum(), rel=1e-9)
    assert second["gap_se"] == pytest.approx(np.sqrt(a.size * np.var(a - b, ddof=1)), rel=0.05)


def test_pointwise_terms_sit_at_each_cohorts_age(doc):
    # One cohort per age in the table: each LOO term belongs to one age.
    x = doc["pointwise"]["x"]
    assert sorted(x) == [1, 2, 3, 4, 6, 8, 10, 12, 15, 18, 21, 25, 30, 35, 40, 50]


def test_verdicts_stand_side_by_side_for_every_assumption(doc):
    keys = [row["assumption"] for row in doc["verdicts"]]
    assert keys[:3] == ["priors", "computation", "implementation"]
    assert {"curve_shape", "eventual_fraction", "cohort_homogeneity", "independent_units"} <= set(keys)
    for row in doc["verdicts"]:
        assert set(row["verdicts"]) == {r["design"] for r in doc["comparison"]}


def test_wrong_design_has_a_broken_assumption_and_the_true_one_none(doc):
    by = {row["assumption"]: row["verdicts"] for row in doc["verdicts"]}
    wrong, true = label(shared_runs.WRONG_DESIGN), label(shared_runs.TRUE_DESIGN)
    assert "broken" in {v[wrong] for v in by.values()}
    assert "broken" not in {v[true] for v in by.values()}


def test_compare_writes_one_self_contained_report_and_each_designs_report(compared, doc):
    page = (compared / "compare.html").read_text()
    assert "<script" not in page and "http://" not in page and "https://" not in page
    assert page.count("data:image/png;base64,") == 1
    assert doc["statement"].split(":")[0] in page
    assert len(list((compared / "designs").glob("*/report.html"))) == 2
    assert (compared / "notebook.ipynb").stat().st_size > 0


def test_manifest_records_data_hash_seed_versions_and_platform(doc):
    m = doc["manifest"]
    assert m["data"]["sha256"] == doc["data"]["sha256"] and len(m["data"]["sha256"]) == 64
    assert m["seed"] == 2
    assert {"python", "pymc", "arviz", "numpy", "nutpie"} <= set(m["versions"])
    assert m["platform"]["system"] and m["started"]
    assert m["plan"]["designs"] == [shared_runs.TRUE_DESIGN, shared_runs.WRONG_DESIGN]


def test_result_object_to_dict_equals_the_written_json(compared, doc):
    # The Python API and the command line give the same document.
    import workbench

    result = workbench.compare([shared_runs.TRUE_DESIGN, shared_runs.WRONG_DESIGN], shared_runs.timing_csv(),
                               seed=2, relax=False, settings=engine.Settings(**shared_runs.TIMING_SAMPLING),
                               cache=shared_runs.cache_folder(), write=False)
    reproduced = result.to_dict()
    assert reproduced["comparison"] == doc["comparison"]
    assert reproduced["verdicts"] == doc["verdicts"]
    assert doc["statement"] in result._repr_html_().replace("&#x27;", "'")


# --- the fit cache ---------------------------------------------------------------------------------


def test_corrupt_cached_fit_is_detected_refitted_and_gives_the_same_numbers(compared, doc, tmp_path):
    from workbench import fitcache
    from workbench.compare import compare
    from workbench.fitcache import CorruptFitWarning

    from workbench.api import resolve_design

    spec = plans.parse_design(shared_runs.WRONG_DESIGN)
    wrong = resolve_design(spec.target, spec.options, spec.priors).key()
    sidecars = [json.loads(p.read_text()) for p in shared_runs.cache_folder().glob("*.json")]
    keys = [s["key"] for s in sidecars if s["fields"]["design"] == wrong]
    assert len(keys) == 1
    victim = shared_runs.cache_folder() / f"{keys[0]}.nc"
    raw = bytearray(victim.read_bytes())
    raw[len(raw) // 2] ^= 0xFF  # one flipped byte in the middle of the file
    victim.write_bytes(bytes(raw))
    with pytest.warns(CorruptFitWarning, match="does not match its recorded SHA-256"):
        result = compare([shared_runs.TRUE_DESIGN, shared_runs.WRONG_DESIGN], shared_runs.timing_csv(),
                         seed=2, relax=False, settings=engine.Settings(**shared_runs.TIMING_SAMPLING),
                         cache=shared_runs.cache_folder(), write=False)
    assert result.to_dict()["comparison"] == doc["comparison"]
    with warnings.catch_warnings():
        warnings.simplefilter("error", CorruptFitWarning)  # the entry was stored again, whole
        assert fitcache.load(shared_runs.cache_folder(), keys[0]) is not None


# --- wording and bad input (no fits) -----------------------------------------------------------------


def rows(*diffs_and_se):
    out = [{"design": "A", "place": 1, "gap": 0.0, "gap_se": 0.0, "stacking_weight": 0.6,
            "level_with_best": True, "high_k_rows": []}]
    for i, (diff, se) in enumerate(diffs_and_se, start=1):
        out.append({"design": "BCD"[i - 1], "place": i + 1, "gap": -diff, "gap_se": se,
                    "stacking_weight": 0.4 / len(diffs_and_se),
                    "level_with_best": too_close_to_call(-diff, se), "high_k_rows": []})
    return out


def test_difference_within_two_standard_errors_names_no_winner():
    text, winner = statement(rows((-5.0, 3.0)))
    assert winner is None
    assert text.startswith("No clear winner: A and B predict about equally well")
    assert "5.0 (SE 3.0)" in text


def test_difference_beyond_two_standard_errors_names_the_winner():
    text, winner = statement(rows((-9.0, 3.0)))
    assert winner == "A" and "A predicts best" in text


def test_identical_designs_with_a_rounding_difference_name_no_winner():
    # Two copies of one model: a difference of 1e-12 with an SE of 1e-13 is no evidence.
    assert too_close_to_call(-1e-12, 1e-13)
    text, winner = statement(rows((-1e-12, 1e-13)))
    assert winner is None and text.startswith("No clear winner")


def test_a_small_difference_with_a_small_se_is_still_too_close_to_call():
    # Sivula et al. (2022): below about 4 elpd the normal approximation is poor.
    assert too_close_to_call(-3.0, 0.5)
    assert not too_close_to_call(-9.0, 3.0)


def test_one_close_and_one_far_design_keep_the_top_open():
    text, winner = statement(rows((-1.0, 2.0), (-30.0, 5.0)))
    assert winner is None
    assert "C predicts worse by 30.0 (SE 5.0)" in text


def test_design_text_reads_options_and_prior_overrides():
    spec = plans.parse_design("timing-curve:family=gamma:eventual=all:shape~lognormal(0,1)")
    assert (spec.target, spec.options, spec.priors) == (
        "timing-curve", {"family": "gamma", "eventual": "all"}, {"shape": "lognormal(0,1)"})


def test_design_text_without_key_value_is_one_line_error():
    with pytest.raises(OptionError, match="expected KEY=VALUE or PARAM~DIST"):
        plans.parse_design("timing-curve:weibull")


def test_each_comparison_row_gives_the_gap_to_the_best_and_its_se(doc):
    assert set(doc["comparison"][0]) == {"design", "place", "elpd", "elpd_se", "gap", "gap_se",
                                         "level_with_best", "stacking_weight", "p_loo", "high_k_rows",
                                         "caution"}
    assert [r["place"] for r in doc["comparison"]] == [1, 2]
    assert doc["comparison"][0]["gap"] == 0


def test_the_comparison_page_names_its_columns_in_words_and_no_library(compared):
    page = (compared / "compare.html").read_text()
    assert "Gap to the best" in page and "SE of the gap" in page
    assert "ArviZ:" not in page and "elpd_diff" not in page


def test_a_design_label_keeps_the_options_as_typed():
    assert label("timing-curve:family=weibull") == "timing-curve:family=weibull"
    assert label("timing-curve:eventual=all:family=gamma") == "timing-curve:eventual=all:family=gamma"


def test_the_comparison_names_designs_as_typed(doc):
    assert [d["label"] for d in doc["designs"]] == [shared_runs.TRUE_DESIGN, shared_runs.WRONG_DESIGN]
    assert doc["best"] == shared_runs.TRUE_DESIGN


def test_a_design_written_with_and_without_its_defaults_is_given_twice(capsys):
    from workbench.cli import main

    code = main(["compare", "--data", str(shared_runs.timing_csv()), "timing-curve",
                 "timing-curve:family=weibull", "--quiet"])
    assert code == 2
    assert "design 'timing-curve' is given twice" in capsys.readouterr().err


def test_a_cached_fit_is_reported_under_the_design_as_typed(compared):
    import workbench

    said = []
    workbench.check("timing-curve", shared_runs.timing_csv(),
                    options={"family": "weibull", "eventual": "estimate"}, seed=2, relax=False,
                    settings=engine.Settings(**shared_runs.TIMING_SAMPLING), write=False,
                    cache=shared_runs.cache_folder(), say=said.append)
    assert any(line.startswith(f"{shared_runs.TRUE_DESIGN}: reusing the cached fit") for line in said)


def test_one_design_alone_cannot_be_compared(capsys):
    from workbench.cli import main

    code = main(["compare", "--data", str(shared_runs.timing_csv()), shared_runs.TRUE_DESIGN, "--quiet"])
    assert code == 2
    assert "expected at least two designs; found 1" in capsys.readouterr().err


def test_designs_of_recipes_that_reject_the_table_stop_before_any_fit(capsys, tmp_path):
    from workbench.cli import main

    code = main(["compare", "--data", str(shared_runs.timing_csv()), shared_runs.TRUE_DESIGN,
                 "threshold-geometry:clearance=0.2", "--quiet", "--out", str(tmp_path / "x")])
    err = capsys.readouterr().err
    assert code == 2 and err.count("\n") == 1
    assert "needs column 'distance'" in err
    assert not (tmp_path / "x").exists()


def test_plan_file_lists_designs_as_text_or_tables_with_paths_relative_to_it(tmp_path):
    plan = tmp_path / "sub" / "designs.toml"
    plan.parent.mkdir()
    plan.write_text('data = "../t.csv"\nseed = 4\n'
                    'designs = ["timing-curve:family=weibull", '
                    '{recipe = "my_model.py"}, '
                    '{recipe = "timing-curve", options = {eventual = "all"}, priors = {shape = "lognormal(0,1)"}}]\n')
    read = plans.read_plan(plan)
    assert read.data == plan.parent / "../t.csv" and read.seed == 4
    assert [d.text() for d in read.designs] == [
        "timing-curve:family=weibull", str((plan.parent / "my_model.py").resolve()),
        "timing-curve:eventual=all:shape~lognormal(0,1)"]
