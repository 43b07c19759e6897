"""What a user runs with default settings: where fits run, and scripts as written.

Relaxed models run in this process, shared with one helper process started
before the base fit when a second core is free, or on more helpers when they
pay for their start-up; on helpers (or when ``--workers N`` asks), every built-in recipe's
design travels to spawned processes as plain data, and a user's script with
no ``if __name__ == "__main__":`` guard is not run again inside them.
"""

from __future__ import annotations

import json
import subprocess
import sys
import textwrap
from pathlib import Path

import numpy as np
import pytest

from workbench import executor, registry
from workbench.cli import main

ROOT = Path(__file__).resolve().parents[1]
RECIPES = sorted(name for name, r in registry.load().recipes.items() if r.demo is not None)
# Spawned processes pay for compiling, not sampling: tiny draws keep this quick.
TINY = ["--draws", "100", "--tune", "100", "--chains", "2"]


# --- the rule that picks this process or helpers ---------------------------------------


def test_small_models_on_two_cores_stay_in_this_process():
    # threshold-geometry demo: 5.8 s first compile, about 1 s of sampling.
    assert executor.fits_worth_helpers(3, 5.8, 1.0, chains=4, available=2) == 1


def test_long_compiles_on_many_cores_use_helpers():
    # Four relaxed models of a minute's compile each, chains fit on 16 cores.
    assert executor.fits_worth_helpers(4, 60.0, 30.0, chains=4, available=16) == 4


def test_sampling_that_already_fills_the_cores_gains_nothing_from_helpers():
    # Two cores, four chains: helpers would share the cores the chains already use.
    assert executor.fits_worth_helpers(3, 60.0, 60.0, chains=4, available=2) == 1


def test_one_core_never_starts_helpers():
    assert executor.fits_worth_helpers(5, 100.0, 100.0, chains=1, available=1) == 1


def test_hiding_the_user_script_restores_the_main_module():
    main_module = sys.modules["__main__"]
    before = (main_module.__dict__.get("__file__"), main_module.__dict__.get("__spec__"))
    with executor.user_script_hidden():
        assert "__file__" not in main_module.__dict__ and main_module.__spec__ is None
    assert (main_module.__dict__.get("__file__"), main_module.__dict__.get("__spec__")) == before


# --- every recipe on spawned processes ---------------------------------------------------


@pytest.fixture(scope="module")
def demo_tables(tmp_path_factory) -> dict[str, tuple[Path, dict]]:
    folder = tmp_path_factory.mktemp("demo-tables")
    out = {}
    for name in RECIPES:
        scenario = registry.load().get(name).demo(np.random.default_rng(3))
        path = folder / f"{name}.csv"
        scenario.table.to_csv(path, index=False)
        out[name] = (path, scenario.options)
    return out


@pytest.mark.slow
@pytest.mark.parametrize("name", RECIPES)
def test_every_recipe_fits_its_relaxations_on_spawned_processes(name, demo_tables, tmp_path):
    path, options = demo_tables[name]
    sets = [a for k, v in options.items() for a in ("--set", f"{k}={v}")]
    out = tmp_path / "run"
    code = main(["check", name, "--data", str(path), *sets, *TINY, "--workers", "2", "--quiet",
                 "--out", str(out), "--history", str(tmp_path / "history.sqlite")])
    assert code == 0
    summary = json.loads((out / "summary.json").read_text())
    relaxed = [e for a in summary["assumptions"] for e in a["evidence"] if "relax" in e["check"]]
    assert relaxed, "no relaxed model's evidence reached the summary"


@pytest.mark.slow
def test_the_default_path_gives_what_one_process_gives(demo_tables, tmp_path):
    # Default workers: the early helper shares the relaxed models; each model's
    # seed is its own, so the verdicts and numbers match a single process's.
    path, options = demo_tables["threshold-geometry"]
    sets = [a for k, v in options.items() for a in ("--set", f"{k}={v}")]
    summaries = []
    for extra in ([], ["--workers", "1"]):
        out = tmp_path / f"run{len(summaries)}"
        code = main(["check", "threshold-geometry", "--data", str(path), *sets, *TINY, *extra,
                     "--quiet", "--out", str(out), "--history", str(tmp_path / "h.sqlite")])
        assert code == 0
        summaries.append(json.loads((out / "summary.json").read_text()))
    assert summaries[0]["assumptions"] == summaries[1]["assumptions"]
    assert summaries[0]["parameters"] == summaries[1]["parameters"]


# --- a user's script, as written ------------------------------------------------------------


@pytest.mark.slow
def test_script_without_main_guard_runs_once_on_the_default_path(demo_tables, tmp_path):
    path, options = demo_tables["stage-transitions"]
    script = tmp_path / "my_check.py"
    script.write_text(textwrap.dedent(f"""\
        import workbench
        from workbench.engine import Settings

        print("script body ran")
        result = workbench.check("stage-transitions", {str(path)!r}, options={options!r},
                                 settings=Settings(draws=100, tune=100, chains=2),
                                 out="run", history=False)
        print(sorted(result.verdicts()))
        """))
    done = subprocess.run([sys.executable, str(script)], cwd=tmp_path, capture_output=True,
                          text=True, timeout=600)
    assert done.returncode == 0, done.stderr[-2000:]
    assert done.stdout.count("script body ran") == 1
    assert "Traceback" not in done.stderr
    assert (tmp_path / "run" / "report.html").is_file()


def _failing_fit(*args, **kwargs):
    raise RuntimeError("the sampler stopped")


def test_failed_run_leaves_no_empty_run_folder(throwing_csv, tmp_path, monkeypatch):
    import workbench

    monkeypatch.setattr(workbench.harness, "run_check", _failing_fit)
    out = tmp_path / "run"
    with pytest.raises(RuntimeError):
        workbench.check("threshold-geometry", throwing_csv, options={"clearance": 0.25}, out=out,
                        history=False)
    assert not out.exists()


def test_failed_run_keeps_a_calibration_checkpoint_to_resume_from(tmp_path):
    from workbench import writers

    folder = tmp_path / "run"
    folder.mkdir()
    with pytest.raises(RuntimeError), writers.kept_unless_empty(folder):
        (folder / "calibration.jsonl").write_text("{}\n")
        (folder / "summary.json").write_text("{}")
        raise RuntimeError("stopped while writing")
    assert sorted(p.name for p in folder.iterdir()) == ["calibration.jsonl"]


def test_failed_run_in_a_folder_the_user_made_keeps_the_folder(throwing_csv, tmp_path, monkeypatch):
    import workbench

    monkeypatch.setattr(workbench.harness, "run_check", _failing_fit)
    out = tmp_path / "mine"
    out.mkdir()
    with pytest.raises(RuntimeError):
        workbench.check("threshold-geometry", throwing_csv, options={"clearance": 0.25}, out=out,
                        history=False)
    assert out.is_dir()
