"""Verdicts on public survival datasets that lifelines ships, one row per unit.

``load_waltons``: lifespans of 163 fruit flies, 129 controls and 34 with the
miR-137 gene variant (median about 58 against 26 days; lifelines'
documentation uses it to show two clearly different survival curves).
``load_rossi``: 432 released prisoners followed for 52 weeks, 114 arrests
(Rossi, Berk and Lenihan 1980); financial aid (``fin``) lowers the arrest
hazard only marginally (Cox coefficient about -0.38, p about 0.06 in Fox's
appendix on Cox regression; from memory).

A strong difference between groups must be named as the cause with nothing
else broken; a marginal one and a single cohort must not be called broken.
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
