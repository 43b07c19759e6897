"""Runs shared by the compare, audit, history and notebook tests.

Each run happens once per test process, the first time a test asks for it,
in one scratch folder with one fit cache and one history file: the healthy
audit reuses the comparison's cached fit of the same design, and the
history test sees every run. Draws are small; the timing-curve runs use
more draws than the suite's usual 400 per chain because its bulk ESS per
draw is about 0.2 and the audit's ESS gate asks for 400.
"""

from __future__ import annotations

import functools
import tempfile
from pathlib import Path

import numpy as np
import pandas as pd

# 4 chains x 750 draws: bulk ESS about 600 on the timing-curve fits below.
# A target acceptance other than the default, so that the setting is carried
# through the command line, plan, fit cache and notebook alike.
TIMING_SAMPLING = {"draws": 750, "tune": 400, "chains": 4, "target_accept": 0.85}
# The funnel needs no long chains to show: it diverges within 400 draws.
FUNNEL_SAMPLING = {"draws": 400, "tune": 400, "chains": 4}
# True values of the timing data (ages in units of the median age seen):
# 60% of units ever have the event, so "every unit eventually" is wrong.
TIMING_TRUTH = {"scale": 0.7, "shape": 1.8, "eventual": 0.6}
# Calibration is slow at test sizes; the healthy plan lifts its gate in writing.
IMPLEMENTATION_WAIVER = ('implementation_checked = "the timing-curve code was calibrated on its demo '
                         'layout (200 replicates, implementation holds)"')
TRUE_DESIGN = "timing-curve:family=weibull:eventual=estimate"
WRONG_DESIGN = "timing-curve:family=weibull:eventual=all"


@functools.cache
def root() -> Path:
    return Path(tempfile.mkdtemp(prefix="workbench-shared-runs-"))


def history_file() -> Path:
    return root() / "history.sqlite"


def cache_folder() -> Path:
    return root() / "fit-cache"


@functools.cache
def timing_csv() -> Path:
    """One cohort per age, 150 units each, simulated by the recipe's own simulator."""
    from recipes.timing_curve import RECIPE

    ages = np.array([1, 2, 3, 4, 6, 8, 10, 12, 15, 18, 21, 25, 30, 35, 40, 50], dtype=float)
    skeleton = pd.DataFrame({"cohort": [f"c{i:02d}" for i in range(ages.size)], "age": ages,
                             "exposed": 150, "events": 0})
    options = RECIPE.read_options({"family": "weibull", "eventual": "estimate"})
    data = RECIPE.validate(skeleton, options)
    simulated = RECIPE.simulate(np.random.default_rng(5), data, TIMING_TRUTH, options)
    path = root() / "emergence.csv"
    simulated.to_frame()[["cohort", "age", "exposed", "events"]].to_csv(path, index=False)
    return path


@functools.cache
def grouped_csv() -> Path:
    """Eight groups with six attempts per distance: too few for the group spreads to be
    learnt, so a centred hierarchy has a funnel."""
    from recipes.threshold_geometry import success_probability

    rng = np.random.default_rng(11)
    rows = []
    for g in range(8):
        spread = 0.03 * np.exp(rng.normal(0.0, 0.1))
        for distance in (2.0, 5.0, 9.0):
            p = success_probability(distance, 0.25, spread)
            rows.append({"group": f"g{g}", "distance": distance, "attempts": 6,
                         "successes": int(rng.binomial(6, p))})
    path = root() / "grouped.csv"
    pd.DataFrame(rows).to_csv(path, index=False)
    return path


def sampling_args(sampling: dict) -> list[str]:
    return [f"--{k.replace('_', '-')}={v}" for k, v in sampling.items()]


def toml_sampling(sampling: dict) -> str:
    return "[sampling]\n" + "".join(f"{k} = {v}\n" for k, v in sampling.items())


@functools.cache
def comparison() -> tuple[int, Path]:
    """``workbench compare`` of the true and a wrong timing design; (exit code, folder)."""
    from workbench.cli import main

    out = root() / "compare"
    code = main(["compare", "--data", str(timing_csv()), TRUE_DESIGN, WRONG_DESIGN, "--out", str(out),
                 "--no-relax", "--quiet", "--seed", "2", "--cache", str(cache_folder()),
                 "--history", str(history_file()), *sampling_args(TIMING_SAMPLING)])
    return code, out


def write_plan(name: str, body: str) -> Path:
    path = root() / name
    path.write_text(body, encoding="utf-8")
    return path


@functools.cache
def healthy_plan() -> Path:
    timing_csv()
    return write_plan("healthy.toml", f"""\
title = "Seedling emergence, eventual share estimated"
data = "emergence.csv"
recipe = "timing-curve"
seed = 2
relax = false
[options]
family = "weibull"
eventual = "estimate"
{toml_sampling(TIMING_SAMPLING)}
[waivers]
{IMPLEMENTATION_WAIVER}""")


@functools.cache
def funnel_plan() -> Path:
    grouped_csv()
    return write_plan("funnel.toml", f"""\
data = "grouped.csv"
recipe = "threshold-geometry"
seed = 1
relax = false
[options]
clearance = 0.25
pooling = "partial"
centred = true
{toml_sampling(FUNNEL_SAMPLING)}
[waivers]
min_bfmi = "energy transitions are reviewed with the divergences"
""")


def _audit(plan: Path, folder: str) -> tuple[int, Path]:
    from workbench.cli import main

    out = root() / folder
    code = main(["audit", str(plan), "--out", str(out), "--quiet", "--cache", str(cache_folder()),
                 "--history", str(history_file())])
    return code, out


@functools.cache
def healthy_audit() -> tuple[int, Path]:
    """The audit of the true timing design (after the comparison, so its fit is cached)."""
    comparison()
    return _audit(healthy_plan(), "audit-healthy")


@functools.cache
def funnel_audit() -> tuple[int, Path]:
    """The audit of a centred hierarchy on groups with few attempts."""
    return _audit(funnel_plan(), "audit-funnel")


@functools.cache
def planted_extra_failure():
    """A check of the drone demo layout with an extra failure of 5% per attempt.

    ``angle_only`` is broken there and its relaxed model fitted; returns
    (run, summary document, report page).
    """
    from conftest import FAST
    from recipes.threshold_geometry import RECIPE
    from workbench import harness, writers
    from workbench.recipe import make_design
    from workbench.report.html import render

    design = make_design(RECIPE, {"clearance": "0.35"}, {})
    demo = RECIPE.demo(np.random.default_rng(5))
    base = design.validate(demo.table)
    data = design.simulate(np.random.default_rng(6), base, {**demo.truth, "extra_failure": 0.05})
    run = harness.run_check(design, data, harness.DataInfo("sim", "", data.rows), seed=2,
                            settings=FAST, workers=1)
    summary = writers.summary(run)
    return run, summary, render(run, summary)


# The everyday model files of tests/model_files checked with no ASSUMPTIONS:
# (file stem, planted fault or '' for the clean twin). A clean twin shares its
# faulty table's covariates (same seed), so its fits reuse the compiled models.
AUTOMATIC_SEED = 3


@functools.cache
def automatic_check(stem: str, fault: str = ""):
    """``workbench.check`` of ``tests/model_files/STEM.py`` on its simulated scenario, at the
    suite's small draws and every other default; returns the CheckResult."""
    import importlib.util

    from conftest import FAST
    from workbench import api

    path = Path(__file__).parent / "model_files" / f"{stem}.py"
    spec = importlib.util.spec_from_file_location(f"scenario_{stem}", path)
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    csv = root() / f"{stem}-{fault or 'clean'}.csv"
    module.scenario_table(AUTOMATIC_SEED, fault).to_csv(csv, index=False)
    return api.check(str(path), csv, settings=FAST, out=root() / f"auto-{stem}-{fault or 'clean'}",
                     history=False)
