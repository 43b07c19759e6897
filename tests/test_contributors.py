"""Which rows drive a verdict: the pointwise split of a relaxed model's LOO gain."""

from __future__ import annotations

import numpy as np
import pytest

import shared_runs
from workbench.checks.loo import loo_of
from workbench.checks.relaxation import CONTRIBUTOR_SHARE, TOP_CONTRIBUTORS, contributors, term_labels
from workbench.wording import gain_carriers


@pytest.fixture(scope="module")
def planted():
    """The drone demo layout with an extra failure of 5% per attempt: angle_only is broken."""
    return shared_runs.planted_extra_failure()


def by_key(summary, key):
    return next(a for a in summary["assumptions"] if a["key"] == key)


def test_shares_are_parts_of_the_positive_gain_largest_first():
    gain = np.array([0.5, -1.0, 3.0, 1.5, 0.0])
    found = contributors(gain, ["a", "b", "c", "d", "e"])
    assert [c["row"] for c in found] == [2, 3]
    assert found[0]["share"] == pytest.approx(3.0 / 5.0)
    assert found[1]["share"] == pytest.approx(1.5 / 5.0)


def test_listing_stops_once_most_of_the_gain_is_named():
    gain = np.ones(20)
    found = contributors(gain, [f"row {i + 1}" for i in range(20)])
    assert len(found) == TOP_CONTRIBUTORS
    gain = np.array([9.0, 1.0, 1.0])
    assert [c["row"] for c in contributors(gain, ["a", "b", "c"])] == [0]  # 9/11 > CONTRIBUTOR_SHARE
    assert 9.0 / 11.0 >= CONTRIBUTOR_SHARE


def test_no_positive_gain_names_no_row():
    assert contributors(np.array([-0.2, -0.1]), ["a", "b"]) == []


def test_terms_are_labelled_by_the_recipes_covariate(planted):
    run, _, _ = planted
    labels = term_labels(run.design, run.data, run.data.rows)
    assert labels[0] == f"distance {run.data['distance'][0]:g}"


def test_broken_assumption_names_the_rows_that_carry_its_gain(planted):
    run, summary, _ = planted
    angle = by_key(summary, "angle_only")
    assert angle["verdict"] == "broken"
    found = angle["contributors"]
    assert 1 <= len(found) <= TOP_CONTRIBUTORS
    # Recomputed from both fits' log_likelihood groups (PSIS-LOO pointwise elpd),
    # or from the refits' held-out elpd where PSIS-LOO could not decide.
    relaxation = next(f for f in run.findings if f.check == "relaxation:extra_failure")
    if relaxation.numbers["elpd_method"] == "k-fold":
        gain = run.refits.relaxed["extra_failure"].pointwise - run.refits.base.pointwise
    else:
        gain = (np.asarray(loo_of(run.relaxed["extra_failure"]).elpd_i).ravel()
                - np.asarray(loo_of(run.fit).elpd_i).ravel())
    for c in found:
        assert c["share"] == pytest.approx(gain[c["row"]] / gain[gain > 0].sum())
        assert c["label"] == f"distance {run.data['distance'][c['row']]:g}"
    assert [c["share"] for c in found] == sorted((c["share"] for c in found), reverse=True)


def test_assumptions_that_hold_carry_no_contributors(planted):
    _, summary, _ = planted
    for a in summary["assumptions"]:
        if a["verdict"] in ("holds", "unchecked"):
            assert "contributors" not in a


def test_report_evidence_names_the_rows_that_carry_the_gain(planted):
    _, summary, page = planted
    sentence = gain_carriers(by_key(summary, "angle_only")["contributors"])
    assert sentence and sentence in page.replace("&#39;", "'")
