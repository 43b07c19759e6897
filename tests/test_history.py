"""The run history: rows per run, newest first, filters, revisions, and safe concurrent writes."""

from __future__ import annotations

import os
import signal
import sqlite3
import subprocess
import sys
import textwrap

import pytest

import shared_runs
from workbench import history
from workbench.cli import main


@pytest.fixture(scope="module")
def recorded():
    """The shared comparison and both audits, in this order."""
    shared_runs.comparison()
    shared_runs.healthy_audit()
    shared_runs.funnel_audit()
    return shared_runs.history_file()


def test_history_holds_the_comparison_and_both_audits_newest_first(recorded):
    rows = history.runs(recorded)
    commands = [(r.command, r.gates) for r in rows]
    # Newest first: the funnel audit, then the healthy audit, then the comparison.
    assert commands[:3] == [("audit", "fail"), ("audit", "pass"), ("compare", None)]
    assert [r.id for r in rows] == sorted((r.id for r in rows), reverse=True)


def test_each_row_records_model_and_data_hashes_verdicts_and_report(recorded):
    audit = next(r for r in history.runs(recorded) if r.command == "audit" and r.gates == "fail")
    assert audit.target == "threshold-geometry" and len(audit.target_hash) == 64
    assert len(audit.data_hash) == 64 and audit.report.endswith("audit.html")
    assert audit.verdicts["computation"] == "broken"
    compared = next(r for r in history.runs(recorded) if r.command == "compare")
    assert set(compared.verdicts) == set(compared.design.split(" | "))


def test_history_command_prints_one_line_per_run_newest_first(recorded, capsys):
    assert main(["history", "--history", str(recorded)]) == 0
    lines = capsys.readouterr().out.strip().splitlines()
    assert len(lines) == len(history.runs(recorded))
    assert "audit" in lines[0] and "gates fail" in lines[0]
    assert "compare" in lines[-1] or "compare" in "".join(lines)


def test_filters_by_recipe_and_by_data_hash(recorded, capsys):
    timing = history.runs(recorded, target="timing-curve")
    assert {r.command for r in timing} == {"compare", "audit"}
    assert all("timing-curve" in r.target for r in timing)
    funnel = next(r for r in history.runs(recorded) if r.gates == "fail")
    by_data = history.runs(recorded, data_hash=funnel.data_hash[:10])
    assert [r.id for r in by_data] == [funnel.id]
    main(["history", "--history", str(recorded), "--recipe", "threshold-geometry"])
    assert capsys.readouterr().out.count("\n") == 1


def entry(target_hash: str, verdicts: dict, command: str = "check") -> history.Entry:
    return history.Entry(command=command, target="/models/growth.py", target_hash=target_hash,
                         design="growth.py", data_path="d.csv", data_hash="ab" * 32, seed=1,
                         verdicts=verdicts, report="r.html")


def test_changes_show_how_verdicts_moved_across_model_revisions(tmp_path, capsys):
    path = tmp_path / "h.sqlite"
    history.record(path, entry("1" * 64, {"computation": "broken", "predictions": "holds"}))
    history.record(path, entry("1" * 64, {"computation": "broken", "predictions": "holds"}))
    history.record(path, entry("2" * 64, {"computation": "holds", "predictions": "holds"}))
    revisions = history.changes(path, target="growth.py")
    assert [r.target_hash[0] for r in revisions] == ["1", "2"]
    assert revisions[1].changed == {"computation": ("broken", "holds")}
    main(["history", "--history", str(path), "--changes"])
    out = capsys.readouterr().out
    assert "revision 22222222" in out and "computation broken -> holds" in out


WRITER = textwrap.dedent("""
    import sys
    from workbench import history
    path, tag, n = sys.argv[1], sys.argv[2], int(sys.argv[3])
    for i in range(n):
        history.record(path, history.Entry(command="check", target=tag, target_hash="0" * 64,
                       design=f"{tag}-{i}", data_path="d.csv", data_hash="f" * 64, seed=i,
                       verdicts={"computation": "holds"}, report="r.html"))
""")


def test_two_processes_writing_at_once_lose_no_row(tmp_path):
    path = tmp_path / "h.sqlite"
    history.connect(path).close()
    n = 60
    writers = [subprocess.Popen([sys.executable, "-c", WRITER, str(path), tag, str(n)]) for tag in "ab"]
    assert [w.wait(timeout=120) for w in writers] == [0, 0]
    rows = history.runs(path)
    assert len(rows) == 2 * n
    for tag in "ab":
        assert sorted(r.design for r in rows if r.target == tag) == sorted(f"{tag}-{i}" for i in range(n))
    with sqlite3.connect(path) as conn:
        assert conn.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
        assert conn.execute("PRAGMA journal_mode").fetchone()[0] == "wal"


KILLED = textwrap.dedent("""
    import sys, time
    from workbench import history
    conn = history.connect(sys.argv[1])
    conn.execute("BEGIN IMMEDIATE")
    conn.execute("INSERT INTO runs (time, command, target, target_hash, design, data_path, data_hash, "
                 "seed, verdicts, gates, report) VALUES ('t', 'check', 'half', '', 'half', 'd', 'f', 1, '{}', NULL, 'r')")
    print("inside", flush=True)
    time.sleep(600)
""")


def test_writer_killed_mid_transaction_leaves_a_consistent_database(tmp_path):
    path = tmp_path / "h.sqlite"
    history.record(path, entry("1" * 64, {"computation": "holds"}))
    writer = subprocess.Popen([sys.executable, "-c", KILLED, str(path)], stdout=subprocess.PIPE, text=True)
    assert writer.stdout.readline().strip() == "inside"
    os.kill(writer.pid, signal.SIGKILL)
    writer.wait(timeout=30)
    rows = history.runs(path)
    assert [r.target for r in rows] == ["/models/growth.py"]  # the half-written row is gone
    history.record(path, entry("2" * 64, {"computation": "holds"}))  # the write lock was released
    assert len(history.runs(path)) == 2
    with sqlite3.connect(path) as conn:
        assert conn.execute("PRAGMA integrity_check").fetchone()[0] == "ok"


def test_a_file_that_is_not_a_history_is_a_one_line_error(tmp_path, capsys):
    path = tmp_path / "h.sqlite"
    path.write_text("not a database, just text\n" * 100)
    assert main(["history", "--history", str(path)]) == 2
    err = capsys.readouterr().err
    assert err.count("\n") == 1 and "expected a workbench history database" in err


def test_a_recipe_filter_matching_nothing_suggests_the_close_recorded_name(tmp_path, capsys):
    path = tmp_path / "h.sqlite"
    history.record(path, history.Entry(command="check", target="timing-curve", target_hash="0" * 64,
                                       design="timing-curve:family=weibull", data_path="d.csv",
                                       data_hash="f" * 64, seed=1, verdicts={}, report="r.html"))
    assert main(["history", "--history", str(path), "--recipe", "timing-curv"]) == 0
    assert "matching the filters; did you mean 'timing-curve'?" in capsys.readouterr().out


def test_a_limit_below_one_is_refused(tmp_path, capsys):
    assert main(["history", "--history", str(tmp_path / "h.sqlite"), "--limit", "-1"]) == 2
    err = capsys.readouterr().err
    assert err == "workbench: error: history: argument --limit: expected a whole number >= 1; found '-1'\n"
