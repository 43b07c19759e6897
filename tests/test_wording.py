"""Numbers and check names as the report writes them for people."""

from __future__ import annotations

import pytest

from workbench import wording
from workbench.report.html import check_words


@pytest.mark.parametrize("value, text", [(2590.4, "2,590"), (1e5, "100,000"), (0.0217, "0.0217"),
                                         (8.619, "8.62"), (-3.16, "-3.16"), (0, "0")])
def test_numbers_are_written_in_full_with_thousands_separators(value, text):
    assert wording.number(value) == text


def test_very_small_and_very_large_numbers_are_written_as_powers_of_ten():
    assert wording.number(0.0000123) == "1.23 × 10⁻⁵"
    assert wording.number(4.5e8) == "4.5 × 10⁸"


def test_a_missing_number_is_a_dash():
    assert wording.number(None) == wording.number(float("nan")) == "–"


def test_effective_draws_are_whole_numbers():
    assert wording.count(1586.06) == "1,586"


@pytest.mark.parametrize("p, text", [(0.0, "< 0.001"), (0.0004, "< 0.001"), (0.0043, "0.0043"),
                                     (0.043, "0.043"), (0.953, "0.95"), (1.0, "> 0.999")])
def test_p_values_never_read_zero_or_one(p, text):
    assert wording.p_value(p) == text


def test_a_p_value_in_a_sentence_keeps_its_relation():
    assert wording.p_equals(0.0) == "p < 0.001"
    assert wording.p_equals(0.25) == "p = 0.25"


def test_check_ids_read_as_words_with_the_column_behind_the_outcome():
    assert check_words("prior_coverage:y:sd", {"y": "successes"}) == "Prior predictive spread of successes"
    assert check_words("computation:rhat") == "Chains agree (R-hat)"


def test_a_check_under_a_relaxed_model_names_the_freed_parameter():
    assert check_words("ppc:late_trend|cohort_sd") == "Predictive check: late trend, with cohort_sd free"
    assert check_words("sampling|curve_power") == "Sampler, with curve_power free"


def test_sentences_spell_out_e_notation():
    assert wording.readable("interval 5.91e-05 to 2.59e+03 (null 0)") == \
        "interval 5.91 × 10⁻⁵ to 2,590 (null 0)"
