"""Nothing is lost when a run fails: whole files or none, never a truncated one.

Every output file is written to a temporary name in its folder and renamed
into place (``workbench.writers.atomic_write``), so a process killed at any
moment leaves each output as the previous run's complete file, the new
complete file, or absent. These tests watch a real ``workbench check``
process: one run records every file it opens for writing, then runs are
killed at seeded random moments with SIGINT (Ctrl-C) and SIGKILL, and every
file left behind must be whole.

Not covered here, on purpose: the calibration checkpoint is an append-only
log of whole lines (tests/test_calibration.py resumes after kills), the run
history is SQLite with transactions (tests/test_history.py kills a writer
and runs two at once) and a corrupt cached fit is detected by its hash
(tests/test_compare.py).
"""

from __future__ import annotations

import ast
import json
import os
import re
import signal
import sqlite3
import subprocess
import sys
import threading
import time
from pathlib import Path

import nbformat
import numpy as np
import pytest
import xarray as xr

from workbench import writers
from workbench.cli import main

OUTPUTS = ("report.html", "summary.json", "posterior.nc", "notebook.ipynb")
RUN = ["--set", "clearance=0.25", "--draws", "100", "--tune", "100", "--chains", "2", "--no-relax"]
# The line the run prints when sampling is over and checks and writes begin.
CHECKS_START = "running checks"

# Installed in the watched process: notes every path inside the run folder
# that is opened for writing and every rename (Python file objects, low-level
# os.open as used by tempfile, and HDF5 files behind the NetCDF writer).
TRACKER = r'''
import builtins, io, json, os
_LOG = open(os.environ["TRACK_LOG"], "a", encoding="utf-8")
_ROOT = os.path.realpath(os.environ["TRACK_ROOT"])

def _note(kind, path):
    if isinstance(path, int):
        return
    real = os.path.realpath(os.fsdecode(path))
    if real.startswith(_ROOT + os.sep):
        _LOG.write(json.dumps([kind, real]) + "\n")
        _LOG.flush()

_os_open = os.open
def _tracked_os_open(path, flags, *args, **kwargs):
    if flags & (os.O_WRONLY | os.O_RDWR | os.O_CREAT | os.O_APPEND | os.O_TRUNC):
        _note("write", path)
    return _os_open(path, flags, *args, **kwargs)
os.open = _tracked_os_open

_open = builtins.open
def _tracked_open(file, mode="r", *args, **kwargs):
    if any(c in mode for c in "wax+"):
        _note("write", file)
    return _open(file, mode, *args, **kwargs)
builtins.open = io.open = _tracked_open

for _name in ("replace", "rename"):
    def _make(original):
        def moved(src, dst, *args, **kwargs):
            _note("from", src)
            _note("to", dst)
            return original(src, dst, *args, **kwargs)
        return moved
    setattr(os, _name, _make(getattr(os, _name)))

import h5py
_h5_init = h5py.File.__init__
def _tracked_h5(self, name, mode="r", *args, **kwargs):
    if mode != "r":
        _note("write", name)
    return _h5_init(self, name, mode, *args, **kwargs)
h5py.File.__init__ = _tracked_h5
'''


class Watched:
    """A ``workbench check`` process with its stderr lines timestamped."""

    def __init__(self, args: list[str], cwd: Path, env: dict | None = None, preload: str = ""):
        # The installed command's own entry point.
        code = f"{preload}from workbench.cli import run; run()"
        self.start = time.monotonic()
        self.proc = subprocess.Popen([sys.executable, "-c", code, *args], cwd=cwd, env=env,
                                     stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
        self.lines: list[tuple[float, str]] = []
        self.seen = threading.Condition()
        self.reader = threading.Thread(target=self._read, daemon=True)
        self.reader.start()

    def _read(self):
        for line in self.proc.stderr:
            with self.seen:
                self.lines.append((time.monotonic() - self.start, line.rstrip("\n")))
                self.seen.notify_all()

    def wait_for(self, text: str, timeout: float = 600) -> float:
        """Seconds from start until a stderr line containing ``text`` (None if the run ended first)."""
        deadline = time.monotonic() + timeout
        with self.seen:
            while True:
                for t, line in self.lines:
                    if text in line:
                        return t
                if self.proc.poll() is not None and not self.reader.is_alive():
                    return None
                if time.monotonic() > deadline:
                    raise AssertionError(f"no line containing {text!r} within {timeout} s")
                self.seen.wait(0.2)

    def finish(self, timeout: float = 600) -> int:
        code = self.proc.wait(timeout)
        self.reader.join(10)
        return code

    def stderr(self) -> str:
        return "\n".join(line for _, line in self.lines)


def check_args(csv: str, out: Path, history: Path, seed: int) -> list[str]:
    return ["check", "threshold-geometry", "--data", csv, *RUN, "--out", str(out), "--seed", str(seed),
            "--history", str(history)]


def assert_whole(folder: Path) -> list[str]:
    """Every output present is complete; returns the names present."""
    present = [name for name in OUTPUTS if (folder / name).exists()]
    for name in present:
        path = folder / name
        if name == "summary.json":
            assert json.loads(path.read_text(encoding="utf-8"))["schema"] == writers.SCHEMA
        elif name == "posterior.nc":
            with xr.open_datatree(path, engine="h5netcdf") as tree:
                assert "posterior" in tree.children
        elif name == "notebook.ipynb":
            nbformat.validate(nbformat.reads(path.read_text(encoding="utf-8"), as_version=4))
        else:
            assert path.read_text(encoding="utf-8").rstrip().endswith("</html>")
    # A temporary file may outlive SIGKILL, but never under an output's own name.
    for leftover in folder.iterdir():
        assert leftover.name in OUTPUTS or (leftover.name.startswith(".") and leftover.name.endswith(".tmp")), \
            leftover.name
    return present


def assert_history_consistent(path: Path) -> None:
    if not path.exists():
        return
    conn = sqlite3.connect(path)
    try:
        assert conn.execute("PRAGMA integrity_check").fetchone()[0] == "ok"
        for (verdicts,) in conn.execute("SELECT verdicts FROM runs"):
            assert json.loads(verdicts)
    finally:
        conn.close()


# --- a complete run, watched ------------------------------------------------------------------


@pytest.fixture(scope="module")
def previous(tmp_path_factory, throwing_csv):
    """One complete run whose writes are tracked; its files are the 'previous' ones."""
    root = tmp_path_factory.mktemp("nothing-lost")
    out, log = root / "run", root / "writes.jsonl"
    (root / "track_writes.py").write_text(TRACKER, encoding="utf-8")
    env = {**os.environ, "PYTHONPATH": str(root), "TRACK_LOG": str(log), "TRACK_ROOT": str(out)}
    watched = Watched(check_args(throwing_csv, out, root / "history.sqlite", seed=1), root, env,
                      preload="import track_writes; ")
    assert watched.finish() == 0, watched.stderr()
    checks_at = watched.wait_for(CHECKS_START)
    # Time from the start of checks to the end of writing, with a margin.
    window = 1.2 * (time.monotonic() - watched.start - checks_at)
    records = [json.loads(line) for line in log.read_text(encoding="utf-8").splitlines()]
    return {"root": root, "out": out, "records": records, "window": window, "csv": throwing_csv,
            "stderr": watched.stderr()}


def test_every_output_is_written_under_a_temporary_name(previous):
    written = [Path(p) for kind, p in previous["records"] if kind == "write"]
    assert written, "the tracker saw no write"
    for path in written:
        assert path.name.startswith(".") and path.name.endswith(".tmp"), f"{path.name} written in place"


def test_every_output_reaches_its_name_by_a_rename(previous):
    moved = {Path(p).name for kind, p in previous["records"] if kind == "to"}
    assert set(OUTPUTS) <= moved
    assert assert_whole(previous["out"]) == list(OUTPUTS)


def test_sampling_progress_in_a_log_is_plain_lines_with_counts(previous):
    # 2 chains x (100 warm-up + 100 draws); standard error is a pipe, not a terminal.
    # Lines name the design as typed (threshold-geometry:clearance=...).
    lines = [line.split(": ", 1)[1] for line in previous["stderr"].splitlines()
             if re.match(r"threshold-geometry(:\S+)?: sampling:", line)]
    assert lines[0] == "sampling: 0/400 done"
    assert lines[-1].startswith("sampling: 400/400 done")
    assert "\r" not in previous["stderr"]


# --- killed at random moments --------------------------------------------------------------------

KILLS = [(signal.SIGINT, 11), (signal.SIGKILL, 12)]


@pytest.mark.parametrize("sig, seed", KILLS, ids=[f"{s.name}-{n}" for s, n in KILLS])
def test_run_killed_while_checking_or_writing_leaves_whole_files(previous, sig, seed):
    rng = np.random.default_rng(seed)
    history = previous["root"] / "history.sqlite"
    watched = Watched(check_args(previous["csv"], previous["out"], history, seed=seed) + ["--force"],
                      previous["root"])
    if watched.wait_for(CHECKS_START) is not None:
        time.sleep(rng.uniform(0.0, previous["window"]))
        if watched.proc.poll() is None:
            watched.proc.send_signal(sig)
    code = watched.finish()
    if sig == signal.SIGINT and code != 0:
        assert code == 130 and "interrupted" in watched.stderr()
    assert assert_whole(previous["out"]) == list(OUTPUTS)  # the previous files at the least
    assert_history_consistent(history)


def test_ctrl_c_while_sampling_keeps_the_previous_files(previous):
    before = {name: (previous["out"] / name).read_bytes() for name in ("summary.json", "report.html")}
    watched = Watched(check_args(previous["csv"], previous["out"], previous["root"] / "history.sqlite",
                                 seed=21) + ["--force"], previous["root"])
    assert watched.wait_for("sampling") is not None
    watched.proc.send_signal(signal.SIGINT)
    code = watched.finish()
    assert code == 130, watched.stderr()
    assert watched.stderr().rstrip().endswith("finished files are kept")
    assert {name: (previous["out"] / name).read_bytes() for name in before} == before


def test_rerun_with_force_completes_every_file_and_quiet_prints_nothing(previous):
    history = previous["root"] / "history.sqlite"
    watched = Watched(check_args(previous["csv"], previous["out"], history, seed=31) + ["--force", "--quiet"],
                      previous["root"])
    assert watched.finish() == 0, watched.stderr()
    assert watched.stderr() == ""
    assert assert_whole(previous["out"]) == list(OUTPUTS)
    doc = json.loads((previous["out"] / "summary.json").read_text(encoding="utf-8"))
    assert doc["seed"] == 31
    assert_history_consistent(history)


# --- every writer in the code base ------------------------------------------------------------------

# Calls that put bytes in a file; each must go through workbench.writers.
WRITE_CALLS = {"write_text", "write_bytes", "to_netcdf", "to_parquet", "to_zarr", "to_excel", "to_pickle",
               "savefig", "dump"}
# Calls that write a file only when given a path (without one they return text).
WRITE_WITH_PATH = {"to_csv", "to_json"}
# (file, enclosing function) allowed to write directly, and why.
DIRECT_WRITERS = {
    ("workbench/writers.py", "write"): "the atomic writer's own temporary file",
    ("workbench/calibration.py", "open"): "the calibration checkpoint: an append-only log of whole, "
                                          "synced lines; a torn last line is dropped on resume",
    ("workbench/report/plots.py", "to_data_uri"): "a PNG into an in-memory buffer",
}


def _writes_in_place(call: ast.Call) -> bool:
    f = call.func
    name = f.attr if isinstance(f, ast.Attribute) else getattr(f, "id", None)
    if name in WRITE_CALLS:
        return bool(call.args or call.keywords)
    if name in WRITE_WITH_PATH:
        return bool(call.args) or any(k.arg == "path_or_buf" for k in call.keywords)
    if name == "open":
        mode = call.args[1] if len(call.args) > 1 else next(
            (k.value for k in call.keywords if k.arg == "mode"), None)
        return isinstance(mode, ast.Constant) and any(c in str(mode.value) for c in "wax+")
    return False


def direct_writes(root: Path) -> list[tuple[str, str, int]]:
    """(file, enclosing function, line) of every call that writes a file in place."""
    found = []
    for path in sorted([*root.glob("workbench/**/*.py"), *root.glob("recipes/*.py")]):
        stack: list[str] = []

        def visit(node):
            named = isinstance(node, (ast.FunctionDef, ast.AsyncFunctionDef))
            if named:
                stack.append(node.name)
            if isinstance(node, ast.Call) and _writes_in_place(node):
                found.append((path.relative_to(root).as_posix(), stack[-1] if stack else "<module>",
                              node.lineno))
            for child in ast.iter_child_nodes(node):
                visit(child)
            if named:
                stack.pop()

        visit(ast.parse(path.read_text(encoding="utf-8")))
    return found


def test_every_writer_in_the_code_goes_through_the_atomic_writers():
    root = Path(__file__).resolve().parents[1]
    direct = [(f, fn, line) for f, fn, line in direct_writes(root) if (f, fn) not in DIRECT_WRITERS]
    assert direct == [], "write through workbench.writers.atomic_write instead"


def test_the_scan_finds_a_direct_write(tmp_path):
    (tmp_path / "workbench").mkdir()
    (tmp_path / "workbench" / "careless.py").write_text(
        "def save(path, text):\n    open(path, 'w').write(text)\n\n"
        "def table(frame, path):\n    frame.to_csv(path)\n")
    assert direct_writes(tmp_path) == [("workbench/careless.py", "save", 2),
                                       ("workbench/careless.py", "table", 5)]


# --- run folders -----------------------------------------------------------------------------------


def test_existing_run_folder_is_not_overwritten_without_force(previous, capsys):
    before = {name: (previous["out"] / name).read_bytes() for name in OUTPUTS}
    code = main(check_args(previous["csv"], previous["out"], previous["root"] / "history.sqlite", seed=41))
    err = capsys.readouterr().err
    assert code == 2 and "--force" in err and err.count("\n") == 1
    assert {name: (previous["out"] / name).read_bytes() for name in OUTPUTS} == before


def test_without_out_each_run_gets_a_new_folder_named_by_time_and_design(tmp_path):
    label = "threshold-geometry:clearance=0.25"
    first = writers.run_folder(None, label, force=False, root=tmp_path)
    (first / "report.html").write_text("earlier run")
    second = writers.run_folder(None, label, force=False, root=tmp_path)
    assert first != second and first.parent == second.parent == tmp_path
    assert (first / "report.html").read_text() == "earlier run"
    for folder in (first, second):
        stamp, _, rest = folder.name.partition("-")
        assert len(stamp) == 8 and stamp.isdigit()  # YYYYMMDD, then HHMMSS
        assert "threshold-geometry" in rest and "clearance=0.25" in rest


# A process killed by SIGKILL inside atomic_write, after its temporary file got bytes.
KILLED_WRITER = """
import os, signal, sys
from pathlib import Path
from workbench import writers

def write(tmp):
    Path(tmp).write_bytes(b"half a posterior")
    os.kill(os.getpid(), signal.SIGKILL)

writers.atomic_write_with(Path(sys.argv[1]) / "posterior.nc", write)
"""
# What a rerun does first with its --out folder (with or without --force).
RERUN_FOLDER = """
import sys
from workbench import writers
writers.run_folder(sys.argv[1], "rerun", force=sys.argv[2] == "force")
"""


def _leftovers(folder: Path) -> list[str]:
    return sorted(p.name for p in folder.iterdir() if writers.TEMP_PATTERN.fullmatch(p.name))


def test_a_writer_killed_mid_write_leaves_only_a_temporary_file(tmp_path):
    done = subprocess.run([sys.executable, "-c", KILLED_WRITER, str(tmp_path)], timeout=120)
    assert done.returncode == -signal.SIGKILL
    assert not (tmp_path / "posterior.nc").exists()
    assert len(_leftovers(tmp_path)) == 1 and _leftovers(tmp_path)[0].startswith(".posterior.nc.")


def test_a_forced_rerun_clears_the_temporary_files_of_a_killed_run_and_keeps_the_rest(tmp_path):
    subprocess.run([sys.executable, "-c", KILLED_WRITER, str(tmp_path)], timeout=120)
    (tmp_path / ".summary.json.ab12cd_9.tmp").write_bytes(b"")  # an empty one, cut at once
    (tmp_path / "summary.json").write_text("{}")
    (tmp_path / ".notes.tmp").write_text("the user's own file")  # not our pattern
    done = subprocess.run([sys.executable, "-c", RERUN_FOLDER, str(tmp_path), "force"], timeout=120)
    assert done.returncode == 0
    assert _leftovers(tmp_path) == []
    assert sorted(p.name for p in tmp_path.iterdir()) == [".notes.tmp", "summary.json"]


def test_a_folder_holding_only_a_killed_runs_temporary_file_counts_as_empty(tmp_path):
    (tmp_path / ".posterior.nc.k1ll3d_0.tmp").write_bytes(b"")
    done = subprocess.run([sys.executable, "-c", RERUN_FOLDER, str(tmp_path), "no"], timeout=120,
                          capture_output=True, text=True)
    assert done.returncode == 0, done.stderr
    assert list(tmp_path.iterdir()) == []
