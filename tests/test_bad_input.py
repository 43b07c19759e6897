"""Bad usage and bad data: one clear line on stderr, exit status 2, no traceback."""

from __future__ import annotations

import pytest

from workbench.cli import main

GOOD = "distance,attempts,successes\n1,100,90\n2,100,70\n3,100,50\n"


def _run(capsys, tmp_path, csv_text, *extra, target="threshold-geometry", clearance="0.2"):
    path = tmp_path / "table.csv"
    path.write_text(csv_text)
    args = ["check", target, "--data", str(path), "--out", str(tmp_path / "out")]
    if clearance is not None:
        args += ["--set", f"clearance={clearance}"]
    code = main(args + list(extra))
    err = capsys.readouterr().err
    return code, err


@pytest.mark.parametrize(
    "csv_text, expected",
    [
        ("distance,attempt,successes\n1,100,90\n", "needs column 'attempts'; did you mean 'attempt'?"),
        ("distance,attempts\n1,100\n", "needs column 'successes'"),
        ("distance,attempts,successes\n1,many,90\n", "column 'attempts' row 1 (line 2): expected a finite number; found 'many'"),
        ("distance,attempts,successes\n1,100,\n2,100,3\n", "column 'successes' row 1 (line 2): expected a finite number; found an empty cell"),
        ("distance,attempts,successes\n1,100,-3\n", "column 'successes' row 1 (line 2): expected a count >= 0; found -3"),
        ("distance,attempts,successes\n1,100,90\n2,200,212\n", "column 'successes' row 2 (line 3): 212 > attempts 200"),
        ("distance,attempts,successes\n1,0,0\n", "column 'attempts' row 1 (line 2): expected a count >= 1; found 0"),
        ("distance,attempts,successes\n0,10,3\n", "column 'distance' row 1 (line 2): expected a value > 0; found 0"),
        ("distance,attempts,successes\n-2,10,3\n", "column 'distance' row 1 (line 2): expected a value > 0; found -2"),
        ("distance,attempts,successes\n1,10.5,3\n", "column 'attempts' row 1 (line 2): expected a whole count; found 10.5"),
        ("distance,attempts,successes\n", "expected at least one data row"),
    ],
)
def test_bad_table_gives_one_line_and_exit_2(capsys, tmp_path, csv_text, expected):
    code, err = _run(capsys, tmp_path, csv_text)
    assert code == 2
    assert err.count("\n") == 1 and "Traceback" not in err
    assert expected in err


@pytest.mark.parametrize(
    "clearance, extra, expected",
    [
        (None, [], "needs option 'clearance'"),
        ("0", [], "option 'clearance': expected the lateral tolerance"),
        ("-1", [], "option 'clearance'"),
        ("wide", [], "found 'wide'"),
        ("0.2", ["--set", "colour=red"], "has no option 'colour'"),
        ("0.2", ["--set", "pooling=some"], "option 'pooling': expected one of"),
        ("0.2", ["--prior", "spred=halfnormal(0.1)"], "did you mean 'spread'"),
        ("0.2", ["--prior", "spread=halfnorm(0.1)"], "did you mean halfnormal"),
        ("0.2", ["--prior", "spread=halfnormal(__import__)"], "must be numbers"),
        ("0.2", ["--prior", "spread"], "expected PARAM=DIST(ARGS)"),
        ("0.2", ["--seed", "-4"], "expected a whole number from 0 to 2^63 - 1"),
        ("0.2", ["--target-accept", "1.5"], "--target-accept: expected a number above 0 and below 1"),
        ("0.2", ["--target-accept", "high"], "found 'high'"),
    ],
)
def test_bad_option_gives_one_line_and_exit_2(capsys, tmp_path, clearance, extra, expected):
    code, err = _run(capsys, tmp_path, GOOD, *extra, clearance=clearance)
    assert code == 2
    assert err.count("\n") == 1 and "Traceback" not in err
    assert expected in err


def test_unknown_recipe_suggests_the_closest_name(capsys, tmp_path):
    code, err = _run(capsys, tmp_path, GOOD, target="threshold-geometri")
    assert code == 2 and "did you mean 'threshold-geometry'" in err


def test_unreadable_file_is_named(capsys, tmp_path):
    code = main(["check", "threshold-geometry", "--data", str(tmp_path / "missing.csv"),
                 "--set", "clearance=0.2"])
    err = capsys.readouterr().err
    assert code == 2 and "missing.csv" in err and err.count("\n") == 1


def test_binary_garbage_is_an_unreadable_table(capsys, tmp_path):
    path = tmp_path / "table.parquet"
    path.write_bytes(b"\x00\x01not parquet at all")
    code = main(["check", "threshold-geometry", "--data", str(path), "--set", "clearance=0.2"])
    err = capsys.readouterr().err
    assert code == 2 and "expected a Parquet file; it looks like binary data" in err


def test_missing_data_argument_is_a_usage_error(capsys):
    code = main(["check", "threshold-geometry"])
    err = capsys.readouterr().err
    assert code == 2 and "--data" in err and err.count("\n") == 1


def test_existing_output_folder_is_not_overwritten(capsys, tmp_path):
    out = tmp_path / "out"
    out.mkdir()
    (out / "report.html").write_text("earlier work")
    path = tmp_path / "table.csv"
    path.write_text(GOOD)
    code = main(["check", "threshold-geometry", "--data", str(path), "--set", "clearance=0.2",
                 "--out", str(out)])
    err = capsys.readouterr().err
    assert code == 2 and "--force" in err
    assert (out / "report.html").read_text() == "earlier work"


@pytest.mark.parametrize("seed", [-1, 2**63, 99999999999999999999999])
def test_the_api_refuses_a_seed_the_history_cannot_store(tmp_path, seed):
    import workbench
    from workbench.errors import OptionError

    path = tmp_path / "table.csv"
    path.write_text(GOOD)
    with pytest.raises(OptionError, match=r"seed: expected a whole number from 0 to 2\^63 - 1"):
        workbench.check("threshold-geometry", path, options={"clearance": 0.2}, seed=seed, write=False)
