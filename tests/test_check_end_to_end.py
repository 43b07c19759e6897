"""`workbench check` end to end: files, summary schema, numbers equal ArviZ's."""

from __future__ import annotations

import json
import re

import arviz as az
import numpy as np
import pytest
import xarray as xr

from workbench.cli import main

SUMMARY_KEYS = {"schema", "recipe", "design", "seed", "data", "versions", "computation",
                "assumptions", "loo", "calibration"}


@pytest.fixture(scope="module")
def checked(tmp_path_factory, throwing_csv):
    out = tmp_path_factory.mktemp("run") / "out"
    code = main(["check", "threshold-geometry", "--data", throwing_csv, "--set", "clearance=0.25",
                 "--out", str(out), "--seed", "3", "--draws", "400", "--tune", "400", "--quiet"])
    assert code == 0
    return out


def test_check_writes_every_output_file(checked):
    for name in ("report.html", "summary.json", "posterior.nc", "notebook.ipynb"):
        assert (checked / name).stat().st_size > 0
    assert not list(checked.glob(".*.tmp"))


def test_summary_follows_the_schema(checked):
    doc = json.loads((checked / "summary.json").read_text())
    assert SUMMARY_KEYS <= set(doc)
    assert doc["schema"] == "workbench.summary/1"
    assert doc["recipe"] == "threshold-geometry"
    assert doc["data"]["rows"] == 11 and len(doc["data"]["sha256"]) == 64
    keys = {a["key"] for a in doc["assumptions"]}
    assert keys == {"priors", "computation", "implementation", "shared_spread", "angle_only",
                    "independent_attempts"}
    for a in doc["assumptions"]:
        assert a["verdict"] in {"holds", "doubtful", "broken", "unchecked"}
        for e in a["evidence"]:
            # A relaxation's evidence also says how its elpd difference was had.
            extra = {"elpd_method", "why"} if e["check"].startswith("relaxation:") else set()
            assert {"check", "value", "p_value", "detail"} <= set(e) <= {"check", "value", "p_value",
                                                                          "detail"} | extra
    assert set(doc["loo"]) == {"elpd", "se", "p_loo", "bad_pareto_k"}
    assert {"divergences", "max_rhat", "min_ess_bulk", "min_ess_tail", "min_bfmi",
            "treedepth_hits", "seconds"} <= set(doc["computation"])


def test_data_simulated_from_the_story_passes_every_assumption(checked):
    doc = json.loads((checked / "summary.json").read_text())
    verdicts = {a["key"]: a["verdict"] for a in doc["assumptions"]}
    assert verdicts.pop("implementation") == "unchecked"
    assert "broken" not in verdicts.values()


def test_rhat_and_ess_in_the_summary_equal_arviz_on_the_written_tree(checked):
    # Reference library: ArviZ's rank-normalised split R-hat and ESS
    # (Vehtari et al. 2021) on the very DataTree the run wrote.
    doc = json.loads((checked / "summary.json").read_text())
    tree = xr.open_datatree(checked / "posterior.nc", engine="h5netcdf")
    post = tree["posterior"].to_dataset()[["spread"]]
    assert doc["computation"]["max_rhat"] == pytest.approx(float(az.rhat(post)["spread"]), rel=1e-9)
    assert doc["computation"]["min_ess_bulk"] == pytest.approx(float(az.ess(post, method="bulk")["spread"]), rel=1e-9)
    assert doc["computation"]["min_ess_tail"] == pytest.approx(float(az.ess(post, method="tail")["spread"]), rel=1e-9)


def test_parameter_estimates_in_the_summary_equal_arviz_on_the_written_tree(checked):
    # Reference library: ArviZ's mean, sd and rank-normalised split R-hat
    # (Vehtari et al. 2021) on the very DataTree the run wrote.
    doc = json.loads((checked / "summary.json").read_text())
    tree = xr.open_datatree(checked / "posterior.nc", engine="h5netcdf")
    post = tree["posterior"].to_dataset()[["spread"]]
    spread = doc["parameters"]["spread"]
    assert set(spread) == {"mean", "sd", "low", "high", "rhat", "ess_bulk", "ess_tail"}
    assert spread["mean"] == pytest.approx(float(az.mean(post, round_to="none")["spread"]), rel=1e-9)
    assert spread["sd"] == pytest.approx(float(az.std(post, round_to="none")["spread"]), rel=1e-9)
    assert spread["rhat"] == pytest.approx(float(az.rhat(post)["spread"]), rel=1e-9)
    assert spread["low"] < spread["mean"] < spread["high"]


def test_report_shows_the_estimates_after_the_diagnosis(checked):
    page = (checked / "report.html").read_text()
    assert page.index('id="diagnosis"') < page.index('id="estimates"') < page.index('id="evidence"')
    assert "<code>spread</code>" in page[page.index('id="estimates"'):page.index('id="evidence"')]


def test_report_says_the_result_in_one_line_before_any_table(checked):
    page = (checked / "report.html").read_text()
    start = page.index('id="headline"')
    line = page[start:page.index("</p>", start)]
    assert start < page.index("<table")
    if "Nothing is broken or doubtful" in line:
        assert "Not checked: implementation" in line
    else:
        assert "Of 6 assumptions" in line and "Next step:" in line


def test_evidence_names_checks_in_words_and_the_summary_keeps_their_ids(checked):
    page = (checked / "report.html").read_text()
    doc = json.loads((checked / "summary.json").read_text())
    checks = {e["check"] for a in doc["assumptions"] for e in a["evidence"]}
    assert "computation:rhat" in checks
    evidence = page[page.index('id="evidence"'):page.index('id="fit"')]
    assert "<td title=\"computation:rhat\">Chains agree (R-hat)</td>" in evidence
    assert "Prior predictive mean of successes" in evidence


def test_evidence_numbers_never_break_mid_number(checked):
    page = (checked / "report.html").read_text()
    assert "td.n { white-space:nowrap;" in page
    tables = "".join(re.findall(r'<table class="evidence">.*?</table>', page, flags=re.S))
    assert 'class="n">' in tables
    assert not re.search(r"\de[+-]\d", tables) and "p = 0)" not in tables


def test_written_tree_keeps_every_group(checked):
    tree = xr.open_datatree(checked / "posterior.nc", engine="h5netcdf")
    assert {"prior", "prior_predictive", "posterior", "sample_stats", "log_likelihood", "log_prior",
            "posterior_predictive", "observed_data"} <= set(tree.children)


def test_report_is_self_contained_and_puts_the_diagnosis_first(checked):
    page = (checked / "report.html").read_text()
    assert "http://" not in page and "https://" not in page and "<script" not in page
    assert page.index('id="diagnosis"') < page.index('id="evidence"')
    for key in ("shared_spread", "angle_only", "independent_attempts", "priors", "computation"):
        assert f'href="#a-{key}"' in page and f'id="a-{key}"' in page
    assert page.count("data:image/png;base64,") >= 5


def test_rerun_with_the_same_seed_gives_the_same_numbers(checked, throwing_csv, tmp_path):
    out = tmp_path / "again"
    main(["check", "threshold-geometry", "--data", throwing_csv, "--set", "clearance=0.25",
          "--out", str(out), "--seed", "3", "--draws", "400", "--tune", "400", "--quiet", "--no-relax"])
    first = xr.open_datatree(checked / "posterior.nc", engine="h5netcdf")["posterior"]["spread"].values
    second = xr.open_datatree(out / "posterior.nc", engine="h5netcdf")["posterior"]["spread"].values
    np.testing.assert_array_equal(first, second)


def test_notebook_finds_its_table_relative_to_the_run_folder(checked, throwing_csv):
    import hashlib
    from pathlib import Path

    import nbformat

    notebook = nbformat.read(checked / "notebook.ipynb", as_version=4)
    source = "\n".join(c.source for c in notebook.cells if c.cell_type == "code")
    (path,) = re.findall(r"^DATA = '([^']+)'$", source, flags=re.M)
    assert not Path(path).is_absolute()
    assert (checked / path).resolve() == Path(throwing_csv).resolve()
    assert hashlib.sha256(Path(throwing_csv).read_bytes()).hexdigest() in source


def test_a_normal_run_prints_no_library_warning(throwing_csv, tmp_path):
    import subprocess
    import sys
    from pathlib import Path

    workbench = Path(sys.executable).with_name("workbench")
    done = subprocess.run([str(workbench), "check", "threshold-geometry", "--data", throwing_csv,
                           "--set", "clearance=0.25", "--out", str(tmp_path / "run"), "--quiet",
                           "--no-relax", "--draws", "100", "--tune", "100",
                           "--history", str(tmp_path / "h.sqlite")],
                          capture_output=True, text=True, timeout=600)
    assert done.returncode == 0, done.stderr
    assert "Warning" not in done.stderr and "warn" not in done.stderr.lower(), done.stderr
