"""`workbench calibrate`: files, history, and a rerun on the same folder resumes its checkpoint."""

from __future__ import annotations

import json

import pytest

from workbench import history
from workbench.calibration import CHECKPOINT
from workbench.cli import main


def calibrate(throwing_csv, out, history_file, sims, *extra):
    return main(["calibrate", "threshold-geometry", "--data", throwing_csv, "--set", "clearance=0.25",
                 "--sims", str(sims), "--workers", "1", "--seed", "3", "--out", str(out),
                 "--history", str(history_file), "--quiet", *extra])


@pytest.fixture(scope="module")
def calibrated(tmp_path_factory, throwing_csv):
    root = tmp_path_factory.mktemp("calibrate")
    out, history_file = root / "run", root / "history.sqlite"
    assert calibrate(throwing_csv, out, history_file, 2) == 0
    return out, history_file


def test_calibrate_writes_its_report_json_and_notebook(calibrated):
    out, _ = calibrated
    doc = json.loads((out / "calibration.json").read_text())
    assert doc["schema"] == "workbench.calibration-run/1"
    assert doc["calibration"]["sims"] == 2 and doc["calibration"]["completed"] + doc["calibration"]["failed"] == 2
    assert "spread" in doc["calibration"]["parameters"]
    assert doc["implementation"]["key"] == "implementation"
    page = (out / "calibration.html").read_text()
    assert "<script" not in page and page.count("data:image/png;base64,") == 2
    assert (out / "notebook.ipynb").stat().st_size > 0
    assert {"python", "pymc", "nutpie"} <= set(doc["manifest"]["versions"])


def test_calibrate_appends_a_history_row(calibrated):
    out, history_file = calibrated
    rows = history.runs(history_file, command="calibrate")
    assert len(rows) >= 1 and rows[-1].report.endswith("calibration.html")
    assert set(rows[-1].verdicts) == {"implementation"}


def test_another_number_of_replicates_does_not_replace_a_finished_result_without_force(
        calibrated, throwing_csv, capsys):
    out, history_file = calibrated
    before = (out / "calibration.json").read_bytes(), (out / CHECKPOINT).read_bytes()
    sims = json.loads(before[0])["calibration"]["sims"]
    assert calibrate(throwing_csv, out, history_file, sims + 5) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and f"holds a finished calibration of {sims} replicates" in err
    assert ((out / "calibration.json").read_bytes(), (out / CHECKPOINT).read_bytes()) == before


def test_rerun_on_the_same_folder_resumes_and_keeps_finished_replicates(calibrated, throwing_csv):
    out, history_file = calibrated
    before = (out / CHECKPOINT).read_bytes()
    assert calibrate(throwing_csv, out, history_file, 3, "--force") == 0
    after = (out / CHECKPOINT).read_bytes()
    assert after.startswith(before)  # finished replicates were kept, not redone
    assert len(after.splitlines()) == len(before.splitlines()) + 1  # one new replicate
    assert json.loads((out / "calibration.json").read_text())["calibration"]["sims"] == 3
    assert calibrate(throwing_csv, out, history_file, 3) == 0
    assert (out / CHECKPOINT).read_bytes() == after  # nothing left to run


def test_folder_holding_other_files_is_refused_without_force(tmp_path, throwing_csv, capsys):
    (tmp_path / "notes.txt").write_text("mine")
    assert calibrate(throwing_csv, tmp_path, tmp_path / "h.sqlite", 1) == 2
    assert "already holds files" in capsys.readouterr().err


def test_checkpoint_of_another_calibration_is_refused_even_with_force(calibrated, throwing_csv, capsys):
    out, history_file = calibrated
    before = (out / CHECKPOINT).read_bytes()
    code = main(["calibrate", "threshold-geometry", "--data", throwing_csv, "--set", "clearance=0.3",
                 "--sims", "1", "--workers", "1", "--seed", "3", "--out", str(out), "--force",
                 "--history", str(history_file), "--quiet"])
    assert code == 2 and "holds replicates of another calibration" in capsys.readouterr().err
    assert (out / CHECKPOINT).read_bytes() == before
