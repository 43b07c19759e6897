"""The lead figure of a flagged assumption is the evidence that decided its verdict."""

from __future__ import annotations

import re

import pytest

import shared_runs
from workbench.findings import Finding
from workbench.report.html import figure_order
from workbench.verdicts import BROKEN, HOLDS, Judgement, Verdict



@pytest.fixture(scope="module")
def planted():
    return shared_runs.planted_extra_failure()


FIGURES = {"ppc-a": {}, "relaxation-a": {}}


def statistic(level, strength=0.0):
    return (Finding("a", "ppc", "ppc:trend", 0.1, 0.5, figure="ppc-a"), Judgement(level, "", strength=strength))


def relaxation(level, strength=0.0):
    return (Finding("a", "relaxation", "relaxation:slope", 0.3, figure="relaxation-a"),
            Judgement(level, "", strength=strength))


def test_relaxation_that_decided_leads_with_its_posterior():
    verdict = Verdict("a", "", BROKEN, [statistic(0), relaxation(2, strength=5.0)])
    assert figure_order(verdict, FIGURES) == ["relaxation-a", "ppc-a"]


def test_statistic_that_decided_leads_with_its_predictive_histogram():
    verdict = Verdict("a", "", BROKEN, [relaxation(1, strength=9.0), statistic(2, strength=3.0)])
    assert figure_order(verdict, FIGURES) == ["ppc-a", "relaxation-a"]


def test_among_equally_severe_evidence_the_strongest_decides():
    verdict = Verdict("a", "", BROKEN, [statistic(2, strength=3.0), relaxation(2, strength=6.0)])
    assert figure_order(verdict, FIGURES) == ["relaxation-a", "ppc-a"]


def test_an_assumption_that_holds_keeps_the_evidence_order():
    verdict = Verdict("a", "", HOLDS, [statistic(0), relaxation(0)])
    assert figure_order(verdict, FIGURES) == ["ppc-a", "relaxation-a"]


def test_report_puts_the_deciding_figure_first_in_the_broken_assumptions_evidence(planted):
    from workbench.report.html import anchor

    run, _, page = planted
    verdict = next(v for v in run.verdicts if v.key == "angle_only")
    decided = verdict.decided_by
    article = page[page.index(f'<div class="fold-body" id="{anchor("angle_only")}"'):]
    article = article[:article.index("</article>")]
    first_alt = re.search(r'<img src="[^"]*" alt="([^"]*)"', article).group(1)
    expected = {"relaxation": "Posterior of", "ppc": "Targeted statistic"}[decided.kind]
    assert first_alt.startswith(expected)


def test_every_relaxed_model_of_a_recipe_has_a_figure_of_its_own():
    # timing-curve relaxes cohort_homogeneity two ways (timing scale, eventual
    # share): each posterior gets its own figure, named where the finding is made.
    from workbench import rates, registry
    from workbench.checks.relaxation import relaxation_figure

    cohort = []
    for recipe in registry.load().recipes.values():
        design, _, _ = rates._truth_layout(recipe, 0, {})  # the demo scenario's options
        relaxed = [a for a in design.assumptions if a.relaxation]
        names = [relaxation_figure(a.relaxation) for a in relaxed]
        assert len(set(names)) == len(names), (recipe.name, names)
        if recipe.name == "timing-curve":
            cohort = [n for a, n in zip(relaxed, names) if a.key == "cohort_homogeneity"]
    assert len(cohort) == 2
