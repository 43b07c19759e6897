"""A model file whose observed variable is ``pm.Censored`` (right-censored lifetimes).

The data are simulated by the file's own NumPy story from documented true
values (tests/model_files/censored_lifetimes.py), so nothing may be broken.
"""

from __future__ import annotations

import sys
from pathlib import Path

import numpy as np

from workbench import api

FILES = Path(__file__).parent / "model_files"
MODEL = FILES / "censored_lifetimes.py"


def test_censored_model_file_on_its_own_story_is_not_broken(tmp_path, fast_settings):
    sys.path.insert(0, str(FILES))
    try:
        import censored_lifetimes
    finally:
        sys.path.remove(str(FILES))
    # Seed 2: the seeds 1-5 measured at these settings gave `predictions`
    # holds in 4 of 5; seed 5 draws one lamp failing at 0.6 hours (a chance
    # of about 1 in 2,000 under the story) and the minimum is rightly flagged.
    table = censored_lifetimes.example_table(seed=2)
    table.to_csv(tmp_path / "lamps.csv", index=False)
    result = api.check(str(MODEL), tmp_path / "lamps.csv", settings=fast_settings, write=False,
                       history=False)
    verdicts = result.verdicts()
    assert "broken" not in verdicts.values(), verdicts
    assert verdicts["predictions"] == "holds"

    # Replicates are censored as the data were: a censored lamp's replicates
    # never pass the hours it had run, and no replicate runs past the longest
    # follow-up the rig had (the censoring times of failed lamps are drawn
    # from the censoring distribution).
    replicated = result.run.fit.draws(group="posterior_predictive")["hours"]
    hours = result.run.data.to_frame()["hours"].to_numpy()  # as read back from the CSV
    censored = table["failed"].to_numpy() == 0
    assert np.all(replicated[:, censored] <= hours[censored])
    assert replicated.max() <= hours[censored].max()
    # A censored lamp's replicates sit at its bound as often as the story
    # leaves lamps burning then: the randomised LOO-PIT stays uniform.
    pit = result.run.extras["loo_pit"]["hours"]
    assert abs(pit["mean"] - 0.5) < 0.05 and not pit["outside"]
