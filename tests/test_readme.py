"""Every command and Python block of the README runs as pasted.

The blocks run in order, as a new user would paste them after `make demo`,
in a scratch copy of the repository's working layout (the same `.venv`, a
copy of `examples/`, an empty `reports/`). Runs that sample get small draws
and few calibration replicates appended, since this test checks that the
commands run, not their numbers; a command too long for the suite (a
benchmark) runs with `--help`. Nothing is skipped silently: a command the
test does not run is listed in NOT_RUN with the reason.
"""

from __future__ import annotations

import os
import re
import shlex
import shutil
import subprocess
import sys
from pathlib import Path

import pytest

ROOT = Path(__file__).resolve().parents[1]
README = ROOT / "README.md"
# Commands that would rerun the suite or install system packages.
NOT_RUN = {
    "make test": "this test runs inside it",
    "apt-get install chromium chromium-driver": "installs a system package (CI's .ci/run does)",
    ".venv/bin/pytest tests/test_browser.py": "this test runs inside the suite",
}
# Commands that sample: small draws, since the numbers are not under test.
# (`audit` reads its sampling from the plan, whose draws the test lowers.)
SAMPLING = ("check", "compare", "demo", "calibrate")
SMALL = ["--draws", "60", "--tune", "60", "--chains", "2"]
SMALL_SIMS = "4"
SECONDS = 900


def blocks(text: str) -> list[tuple[str, str]]:
    """Fenced blocks of the README as (language, body)."""
    return re.findall(r"^```(\w*)\n(.*?)^```", text, flags=re.S | re.M)


def commands(body: str) -> list[str]:
    """The commands of a shell block: continuation lines joined, comments dropped."""
    joined = re.sub(r"\\\n\s*", " ", body)
    out = []
    for line in joined.splitlines():
        line = re.sub(r"\s+#.*$", "", line).strip()
        if line and not line.startswith("#"):
            out.append(line)
    return out


def is_shell(body: str) -> bool:
    first = commands(body)[:1]
    return bool(first) and first[0].split()[0] in {"make", ".venv/bin/workbench", ".venv/bin/python",
                                                   ".venv/bin/pytest", "apt-get", "echo"}


def small(command: str) -> str:
    """The command with small draws and replicates (see the module docstring)."""
    words = shlex.split(command)
    if words == ["make", "demo"]:
        return shlex.join(words + ["DEMO_FLAGS=" + " ".join(SMALL)])
    if words[0] == ".venv/bin/python" and words[1].startswith("benchmarks/"):
        return shlex.join(words[:2] + ["--help"])
    if words[0] == ".venv/bin/workbench" and words[1] in SAMPLING and words[1] != "audit":
        words = [SMALL_SIMS if prev in {"--sims", "--sbc"} else w
                 for prev, w in zip([""] + words[:-1], words)]
        return shlex.join(words + SMALL)
    return command


def python_blocks(text: str) -> list[str]:
    """Python blocks that are scripts to run (the example model file is a file, shown in full)."""
    return [body for lang, body in blocks(text) if lang == "python" and "def build_model" not in body]


@pytest.fixture(scope="module")
def sandbox(tmp_path_factory) -> Path:
    place = tmp_path_factory.mktemp("readme")
    (place / ".venv").symlink_to(ROOT / ".venv")
    for name in ("Makefile", "benchmarks", "scripts"):
        (place / name).symlink_to(ROOT / name)
    # An old pyproject.toml: `make demo` must find the install done, never
    # reinstall the shared .venv from this folder.
    shutil.copy(ROOT / "pyproject.toml", place / "pyproject.toml")
    os.utime(place / "pyproject.toml", (0, 0))
    shutil.copytree(ROOT / "examples", place / "examples")
    (place / "reports").mkdir()
    return place


def run(command: str, where: Path) -> subprocess.CompletedProcess:
    env = {**os.environ, "WORKBENCH_HISTORY": str(where / "reports" / "history.sqlite")}
    return subprocess.run(["bash", "-c", command], cwd=where, capture_output=True, text=True,
                          timeout=SECONDS, env=env)


def shell_commands(text: str) -> list[str]:
    return [c for _, body in blocks(text) if is_shell(body) for c in commands(body)]


def test_readme_names_only_tables_a_user_has():
    # Every --data table is made by `make demo` or a README command, or ships in the repository.
    for command in shell_commands(README.read_text()):
        if command.startswith(".venv/bin/workbench history"):
            continue  # there --data filters by a data hash
        for path in re.findall(r"--data (\S+)", command):
            assert path.startswith(("reports/", "examples/")), command
            if path.startswith("examples/"):
                assert (ROOT / path).is_file(), command


def test_readme_prior_examples_are_quoted_for_the_shell():
    for command in shell_commands(README.read_text()):
        assert not re.search(r"--prior [^'\"]\S*\(", command), command


@pytest.mark.slow
def test_every_readme_block_runs_as_pasted(sandbox):
    text = README.read_text()
    ran = []
    for lang, body in blocks(text):
        first = body.splitlines()[0] if body.strip() else ""
        if first.startswith("# reports/") and first.endswith(".toml"):
            # A plan file the README shows with its path: written where it says.
            path = sandbox / first[2:].strip()
            path.parent.mkdir(parents=True, exist_ok=True)
            path.write_text(re.sub(r"^draws = \d+", f"draws = {SMALL[1]}", body, flags=re.M))
            continue
        if not is_shell(body):
            continue
        for command in commands(body):
            if command in NOT_RUN:
                continue
            done = run(small(command), sandbox)
            # audit exits 1 when a gate fails: the README says so beside it.
            allowed = {0, 1} if " audit " in f" {command} " else {0}
            assert done.returncode in allowed, (command, done.stderr[-3000:])
            assert "Traceback" not in done.stderr, (command, done.stderr[-3000:])
            ran.append(command)
    assert any(c.startswith("make demo") for c in ran)
    assert sum(c.startswith(".venv/bin/workbench") for c in ran) >= 10


@pytest.mark.slow
def test_readme_python_block_runs_as_a_plain_script(sandbox):
    # Runs after the shell blocks above (pytest keeps file order): their tables exist.
    (script_text,) = python_blocks(README.read_text())
    # Small draws for every call the block makes (the default Settings of this
    # process), and few calibration replicates; the block itself is unchanged.
    preamble = ("from workbench import engine as _engine\n"
                "_engine.Settings.__init__.__defaults__ = (60, 60, 2) + "
                "_engine.Settings.__init__.__defaults__[3:]\n")
    script = sandbox / "readme_api.py"
    script.write_text(preamble + re.sub(r"sims=\d+", f"sims={SMALL_SIMS}", script_text)
                      + "\nprint('finished')\n")
    done = subprocess.run([sys.executable, str(script)], cwd=sandbox, capture_output=True,
                          text=True, timeout=SECONDS,
                          env={**os.environ, "WORKBENCH_HISTORY": str(sandbox / "reports" / "h.sqlite")})
    assert done.returncode == 0, done.stderr[-3000:]
    assert done.stdout.strip().endswith("finished")
    assert "Traceback" not in done.stderr
