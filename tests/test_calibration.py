"""Simulation-based calibration: the runner, its executors, its checkpoint,
the uniformity test and the verdict on the ``implementation`` assumption.

Compiling a model costs seconds per process, so the expensive runs are
module-scoped fixtures shared by several tests, with small draws.
"""

from __future__ import annotations

import json
import textwrap
import threading
import time

import numpy as np
import pandas as pd
import pytest

from workbench import calibration as sbc
from workbench import executor, registry, verdicts
from workbench.checks.calibration import calibration_findings
from workbench.engine import Settings
from workbench.errors import OptionError, OutputError
from workbench.findings import IMPLEMENTATION, Finding
from workbench.recipe import make_design
from workbench.rules import calibration as calibration_rules
from workbench.uniformity import rank_uniformity, simultaneous_band

SEED = 11
# Small fits: ranks among 49 draws thinned from 2 x 150.
L = 49
SETTINGS = Settings(draws=150, tune=200, chains=2)
REFERENCE_SIMS = 60

# An invented practice range: eight distances, a few hundred attempts in all.
TABLE = pd.DataFrame({
    "distance": [0.5, 1.0, 1.5, 2.0, 3.0, 4.0, 5.0, 6.0],
    "attempts": [60, 80, 100, 120, 150, 150, 200, 200],
    "successes": [58, 70, 75, 70, 60, 45, 45, 35],
})
OPTIONS = {"clearance": "0.05"}

# The threshold-geometry story with a planted coding error: the model uses
# spread**2 where the simulator uses spread as the aiming error's sd.
MISCODED_RECIPE = '''
from dataclasses import replace

from recipes.threshold_geometry import RECIPE as BASE, build_model


def build_squared(data, options, prior):
    def squared(name, **kwargs):
        created = prior(name, **kwargs)
        return created ** 2 if name == "spread" else created
    return build_model(data, options, squared)


RECIPE = replace(BASE, name="threshold-geometry-squared", build_model=build_squared)
'''


def _design(recipe):
    design = make_design(recipe, OPTIONS, {})
    return design, recipe.validate(TABLE, design.options)


@pytest.fixture(scope="module")
def recipes(tmp_path_factory):
    folder = tmp_path_factory.mktemp("recipes")
    (folder / "squared.py").write_text(textwrap.dedent(MISCODED_RECIPE))
    return registry.load([str(folder)])


@pytest.fixture(scope="module")
def design_data(recipes):
    return _design(recipes.get("threshold-geometry"))


@pytest.fixture(scope="module")
def reference(design_data, tmp_path_factory):
    """The correct recipe calibrated in this process (its compiled model is
    then reused by every later in-process run of the same design)."""
    design, data = design_data
    folder = tmp_path_factory.mktemp("reference")
    return sbc.run_calibration(design, data, REFERENCE_SIMS, SEED, workers=1, folder=folder,
                               settings=SETTINGS, quiet=True, ranks=L)


def _lines(folder):
    return (folder / sbc.CHECKPOINT).read_bytes().splitlines(keepends=True)


# --- the correct recipe passes, a mis-coded one is broken --------------------------------


def test_correct_recipe_passes_calibration(reference):
    findings = calibration_findings(reference)
    judged = verdicts.decide([], findings)
    implementation = next(v for v in judged if v.key == IMPLEMENTATION)
    assert set(reference.ranks) == {"spread", sbc.LOG_LIKELIHOOD}
    assert len(reference.replicates) + len(reference.failures) == REFERENCE_SIMS
    assert implementation.verdict == verdicts.HOLDS, [j.sentence for _, j in implementation.evidence]


def test_ranks_lie_between_zero_and_L(reference):
    for values in reference.ranks.values():
        assert values.min() >= 0 and values.max() <= L


def test_miscoded_model_is_rejected_as_broken_implementation(recipes):
    design, data = _design(recipes.get("threshold-geometry-squared"))
    result = sbc.run_calibration(design, data, 16, SEED, workers=1, settings=SETTINGS,
                                 quiet=True, ranks=L)
    findings = calibration_findings(result)
    implementation = next(v for v in verdicts.decide([], findings) if v.key == IMPLEMENTATION)
    spread = next(f for f in findings if f.check == "calibration:spread")
    assert implementation.verdict == verdicts.BROKEN
    # The model's spread**2 matches the truth, so its spread sits above every
    # generating value: ranks pile at zero.
    assert spread.numbers["direction"] == "true_below"


def test_summary_section_has_sims_and_a_p_value_per_parameter(reference):
    section = json.loads(json.dumps(reference.to_dict()))
    assert section["sims"] == REFERENCE_SIMS
    assert section["L"] == L
    for name in ("spread", sbc.LOG_LIKELIHOOD):
        assert 0.0 <= section["parameters"][name]["p_value"] <= 1.0
        assert len(section["ranks"][name]) == section["completed"]


# --- executors give the same replicates ------------------------------------------------


def test_dask_cluster_gives_the_same_replicates_as_the_local_executor(design_data, reference):
    distributed = pytest.importorskip("distributed")
    design, data = design_data
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True,
                                  host="127.0.0.1", dashboard_address=None) as cluster:
        assert cluster.scheduler_address.startswith("tcp://127.0.0.1")
        result = sbc.run_calibration(design, data, 6, SEED, cluster=cluster.scheduler_address,
                                     settings=SETTINGS, quiet=True, ranks=L)
    assert result.records == {i: reference.records[i] for i in range(6)}


def test_killed_worker_replicates_are_redone_on_local_processes(design_data, reference,
                                                                 tmp_path):
    psutil = pytest.importorskip("psutil")
    design, data = design_data
    sims = 40
    before = {p.pid for p in psutil.Process().children(recursive=True)}
    outcome = {}

    def run():
        outcome["result"] = sbc.run_calibration(design, data, sims, SEED, workers=2,
                                                folder=tmp_path, settings=SETTINGS, quiet=True,
                                                ranks=L)

    thread = threading.Thread(target=run)
    thread.start()
    killed = None
    deadline = time.monotonic() + 300
    while killed is None and thread.is_alive() and time.monotonic() < deadline:
        path = tmp_path / sbc.CHECKPOINT
        finished = len(_lines(tmp_path)) - 1 if path.exists() else 0
        if finished >= 2:
            for child in psutil.Process().children(recursive=True):
                try:
                    if child.pid not in before and "spawn_main" in " ".join(child.cmdline()):
                        child.kill()  # a worker this test's run started
                        killed = (finished, child.pid)
                        break
                except psutil.NoSuchProcess:
                    continue
        time.sleep(0.01)
    thread.join()
    assert killed is not None and killed[0] < sims, "the run ended before a worker could be killed"
    result = outcome["result"]
    indices = [json.loads(line)["index"] for line in _lines(tmp_path)[1:]]
    assert sorted(indices) == list(range(sims))  # each replicate once, none lost
    assert result.records == {i: reference.records[i] for i in range(sims)}


def test_default_executor_runs_a_short_calibration_in_this_process(design_data, reference, monkeypatch):
    # The model compiled for the reference run is reused: no process is started.
    started = []
    monkeypatch.setattr(sbc, "_local_pool", lambda *a, **k: started.append(a) or iter(()))
    design, data = design_data
    result = sbc.run_calibration(design, data, 12, SEED, settings=SETTINGS, quiet=True, ranks=L)
    assert started == []
    assert result.records == {i: reference.records[i] for i in range(12)}


def test_default_executor_adds_helpers_when_the_work_left_pays_for_them(design_data, reference,
                                                                        monkeypatch, tmp_path):
    # Any work left is worth a helper here, so the parent works beside one worker process.
    monkeypatch.setattr(executor, "HELPERS_WORTH_SECONDS", 0.0)
    monkeypatch.setattr(sbc.os, "cpu_count", lambda: 2)
    pools = []
    original = sbc._local_pool

    def recorded(job, todo, workers, parent_works=False):
        pools.append((len(todo), workers, parent_works))
        return original(job, todo, workers, parent_works=parent_works)

    monkeypatch.setattr(sbc, "_local_pool", recorded)
    design, data = design_data
    result = sbc.run_calibration(design, data, 30, SEED, settings=SETTINGS, quiet=True, ranks=L,
                                 workers=None, folder=tmp_path)
    assert pools and pools[0][1:] == (1, True)
    assert result.records == {i: reference.records[i] for i in range(30)}
    indices = [json.loads(line)["index"] for line in _lines(tmp_path)[1:]]
    assert sorted(indices) == list(range(30))  # each replicate once


# --- resume ------------------------------------------------------------------------------


@pytest.fixture
def counted(monkeypatch):
    """Indices of the replicates actually run in this process."""
    ran = []
    original = sbc._replicate_task

    def counting(job, index):
        ran.append(index)
        return original(job, index)

    monkeypatch.setattr(sbc, "_replicate_task", counting)
    return ran


def test_resume_runs_only_missing_replicates_and_drops_a_torn_line(design_data, reference,
                                                                   tmp_path, counted):
    design, data = design_data
    sbc.run_calibration(design, data, 4, SEED, workers=1, folder=tmp_path, settings=SETTINGS,
                        quiet=True, ranks=L)
    lines = _lines(tmp_path)
    # An interrupted write: the last replicate's line is cut in half.
    (tmp_path / sbc.CHECKPOINT).write_bytes(b"".join(lines[:-1]) + lines[-1][: len(lines[-1]) // 2])
    counted.clear()
    result = sbc.run_calibration(design, data, 8, SEED, workers=1, folder=tmp_path,
                                 settings=SETTINGS, quiet=True, ranks=L)
    assert counted == [3, 4, 5, 6, 7]
    assert _lines(tmp_path)[:4] == lines[:4]  # header and finished replicates untouched
    assert result.records == {i: reference.records[i] for i in range(8)}


def test_rerunning_a_finished_calibration_runs_nothing(design_data, tmp_path, counted):
    design, data = design_data
    first = sbc.run_calibration(design, data, 3, SEED, workers=1, folder=tmp_path,
                                settings=SETTINGS, quiet=True, ranks=L)
    counted.clear()
    again = sbc.run_calibration(design, data, 3, SEED, workers=1, folder=tmp_path,
                                settings=SETTINGS, quiet=True, ranks=L)
    assert counted == []
    assert again.records == first.records
    assert sbc.load_calibration(tmp_path).records == first.records


def test_checkpoint_of_another_seed_is_refused(design_data, tmp_path):
    design, data = design_data
    header = {"format": sbc.FORMAT, "design": design.label(), "data": "x", "seed": SEED + 1}
    (tmp_path / sbc.CHECKPOINT).write_text(json.dumps(header) + "\n")
    with pytest.raises(OutputError, match="another calibration"):
        sbc.run_calibration(design, data, 3, SEED, workers=1, folder=tmp_path,
                            settings=SETTINGS, quiet=True, ranks=L)


def test_settings_too_small_for_L_are_refused(design_data):
    design, data = design_data
    with pytest.raises(OptionError, match="cannot be thinned"):
        sbc.run_calibration(design, data, 3, SEED, settings=Settings(draws=20, chains=2),
                            quiet=True, ranks=L)


def test_interrupted_run_leaves_a_checkpoint_that_resumes(design_data, reference, tmp_path,
                                                          monkeypatch):
    design, data = design_data
    original = sbc._replicate_task

    def interrupted(job, index):
        if index == 3:
            raise KeyboardInterrupt  # Ctrl-C while replicate 3 runs
        return original(job, index)

    monkeypatch.setattr(sbc, "_replicate_task", interrupted)
    with pytest.raises(KeyboardInterrupt):
        sbc.run_calibration(design, data, 6, SEED, workers=1, folder=tmp_path,
                            settings=SETTINGS, quiet=True, ranks=L)
    assert len(_lines(tmp_path)) == 1 + 3  # header and replicates 0..2, each whole
    monkeypatch.setattr(sbc, "_replicate_task", original)
    result = sbc.run_calibration(design, data, 6, SEED, workers=1, folder=tmp_path,
                                 settings=SETTINGS, quiet=True, ranks=L)
    assert result.records == {i: reference.records[i] for i in range(6)}


def test_failed_simulation_is_recorded_with_its_reason_and_the_run_goes_on(design_data):
    from dataclasses import replace

    design, data = design_data

    def fragile(rng, data, params, options):
        if params["spread"] > 0.05:
            raise ValueError("spread out of range")
        return design.recipe.simulate(rng, data, params, options)

    own = make_design(replace(design.recipe, simulate=fragile), OPTIONS, {})
    result = sbc.run_calibration(own, data, 6, SEED, workers=1, settings=SETTINGS, quiet=True,
                                 ranks=L)
    assert result.failures, "expected some prior draws above 0.05 among six"
    assert len(result.replicates) + len(result.failures) == 6
    assert all(f["reason"] == "simulation failed: ValueError: spread out of range"
               for f in result.failures)
    # Each left-out replicate carries the generating values that made it fail.
    assert all(f["truth"]["spread"][0] > 0.05 for f in result.failures)


# --- without an independent simulator ------------------------------------------------------


def test_design_without_simulator_uses_the_prior_predictive_and_says_so(design_data, reference):
    from dataclasses import replace

    design, data = design_data
    own = make_design(replace(design.recipe, simulate=None), OPTIONS, {})
    result = sbc.run_calibration(own, data, 4, SEED, workers=1, settings=SETTINGS, quiet=True,
                                 ranks=L)
    assert result.simulator == sbc.SIMULATOR_MODEL
    assert result.to_dict()["checks"] == "sampler only"
    assert len(result.replicates) + len(result.failures) == 4
    # Same seeds, another simulator: different data, so different replicates.
    assert result.records != {i: reference.records[i] for i in range(4)}


# --- seeds -------------------------------------------------------------------------------


def test_replicate_seeds_depend_only_on_seed_and_index():
    assert sbc.replicate_seeds(5, 3) == sbc.replicate_seeds(5, 3)
    assert sbc.replicate_seeds(5, 3) != sbc.replicate_seeds(5, 4)
    assert sbc.replicate_seeds(5, 3) != sbc.replicate_seeds(6, 3)


# --- the uniformity test on known cases ------------------------------------------------------


def test_uniform_ranks_are_rejected_at_about_the_nominal_rate():
    rng = np.random.default_rng(1)
    p = np.array([rank_uniformity(rng.integers(0, 100, size=100), 99).p_value for _ in range(300)])
    # 300 tests at level 0.05: the rejection count is Binomial(300, 0.05),
    # whose central 99.9% lies within 5..29.
    assert 5 <= np.sum(p < 0.05) <= 29


@pytest.mark.parametrize("a, b, shape, direction", [
    (0.3, 0.3, "u_shape", "too_narrow"),  # ranks piled at both ends
    (4.0, 4.0, "hump", "too_wide"),  # ranks crowding the middle
    (3.0, 1.0, "slope", "true_above"),  # ranks leaning to the top
])
def test_departures_from_uniform_ranks_are_rejected_with_their_shape(a, b, shape, direction):
    rng = np.random.default_rng(2)
    ranks = (rng.beta(a, b, size=100) * 100).astype(int).clip(0, 99)
    test = rank_uniformity(ranks, 99)
    assert test.p_value < 1e-4
    assert (test.shape, test.direction) == (shape, direction)


def test_simultaneous_band_matches_arviz_envelope():
    # Reference library: ArviZ's ecdf_pit envelope (Säilynoja et al. 2022,
    # simulation method) for 100 uniform values at the same 99 points; the
    # two simulations differ, so they agree to a couple of ECDF steps.
    from arviz_stats.ecdf_utils import ecdf_pit

    _, _, lower, upper = ecdf_pit(np.linspace(0, 1, 100), 0.95, 4000, rng=np.random.default_rng(5))
    z, ours_lower, ours_upper = simultaneous_band(100, 99, 0.95)
    assert z.size == 99
    np.testing.assert_allclose(ours_lower, lower[1:-1], atol=0.021)
    np.testing.assert_allclose(ours_upper, upper[1:-1], atol=0.021)


def test_chi_square_matches_scipy_on_binned_ranks():
    from scipy.stats import chisquare

    rng = np.random.default_rng(6)
    ranks = rng.integers(0, 100, size=200)
    test = rank_uniformity(ranks, 99)
    expected = chisquare(np.bincount(ranks // (100 // test.chi2_bins), minlength=test.chi2_bins))
    assert test.chi2_p_value == pytest.approx(expected.pvalue)


# --- figures --------------------------------------------------------------------------------


def test_figures_have_one_panel_per_ranked_quantity(reference):
    from workbench.report.calibration_plots import ecdf_difference_figure, rank_histogram_figure

    for draw in (ecdf_difference_figure, rank_histogram_figure):
        fig = draw(reference)
        titles = [ax.get_title(loc="left") for ax in fig.axes if ax.get_visible()]
        assert [t.split()[0] for t in titles] == list(reference.ranks)


def test_few_replicates_get_no_rank_histogram_of_two_bars():
    from workbench.report.calibration_plots import rank_histogram_figure

    # 25 replicates among L + 1 = 100 ranks allow 2 bars of 10 ranks each: no histogram.
    rng = np.random.default_rng(3)
    records = {i: {"index": i, "failed": None, "ranks": {"spread": int(r)}}
               for i, r in enumerate(rng.integers(0, 100, size=25))}
    fig = rank_histogram_figure(sbc.summarise(records, 25, 99))
    text = " ".join(t.get_text() for ax in fig.axes for t in ax.texts)
    assert "too few for a rank histogram" in text
    assert not any(ax.patches for ax in fig.axes)


def test_figures_draw_user_names_as_written(tmp_path):
    from workbench.report.calibration_plots import ecdf_difference_figure

    name = "rate$\\undefined$"  # mathtext would abort on the unknown command
    rng = np.random.default_rng(7)
    records = {i: {"index": i, "failed": None, "ranks": {name: int(r)}}
               for i, r in enumerate(rng.integers(0, L + 1, size=30))}
    fig = ecdf_difference_figure(sbc.summarise(records, 30, L))
    fig.savefig(tmp_path / "ecdf.png")
    assert fig.axes[0].get_title(loc="left").startswith(name)


# --- the verdict rule ----------------------------------------------------------------------


def _finding(p, tests=2, direction="too_narrow"):
    return Finding(IMPLEMENTATION, "calibration", "calibration:spread", 0.0, p,
                   numbers={"quantity": "spread", "tests": tests, "direction": direction,
                            "simulator": "recipe"})


@pytest.mark.parametrize("p, level", [
    (calibration_rules.BROKEN_FAMILY_ALPHA / 2 * 0.9, 2),
    (calibration_rules.DOUBTFUL_FAMILY_ALPHA / 2 * 0.9, 1),
    (calibration_rules.DOUBTFUL_FAMILY_ALPHA / 2 * 1.1, 0),
])
def test_rule_splits_the_level_over_the_quantities_tested(p, level):
    assert verdicts.judge(_finding(p)).level == level


def _likelihood_finding(p, approximate=""):
    numbers = {"quantity": "log_likelihood", "tests": 2, "direction": "too_narrow", "simulator": "recipe"}
    if approximate:
        numbers["approximate_likelihood"] = approximate
    return Finding(IMPLEMENTATION, "calibration", "calibration:log_likelihood", 0.0, p, numbers=numbers)


def test_log_likelihood_departure_of_a_documented_approximation_is_not_a_coding_error():
    judged = verdicts.judge(_likelihood_finding(1e-6, "one multinomial stands in for a sum of them"))
    assert judged.level == 0 and "as expected" in judged.sentence
    assert verdicts.judge(_likelihood_finding(1e-6)).level == 2


def test_only_the_log_likelihood_finding_carries_the_approximation(reference):
    findings = calibration_findings(reference, "an approximation")
    marked = [f.numbers["quantity"] for f in findings if "approximate_likelihood" in f.numbers]
    assert marked == [sbc.LOG_LIKELIHOOD]


def test_stage_transitions_declares_its_approximate_likelihood_on_stage_counts(design_data):
    # One multinomial per period on stage counts (recipes/stage_transitions.py).
    from workbench.recipe import likelihood_approximation, make_design

    recipe = registry.load().get("stage-transitions")
    demo = recipe.demo(np.random.default_rng(1))
    design = make_design(recipe, demo.options, {})
    assert likelihood_approximation(design, design.validate(demo.table))
    assert not likelihood_approximation(*design_data)
