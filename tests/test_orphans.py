"""Worker processes of the relaxed fits end when the main process is killed."""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import textwrap
import time
from pathlib import Path

# How long the test waits for a worker to start or to end. A limit on waiting,
# not a measured duration: a healthy machine needs a fraction of it.
PATIENCE_SECONDS = 120

# The relaxed fits of threshold-geometry on two worker processes (as --workers 2
# runs them), with a fitter that never finishes, so only the parent's death ends them.
RUN = textwrap.dedent("""
    import time

    import pandas as pd

    from workbench import engine, harness, registry
    from workbench.recipe import make_design


    def never_done(design, data, seed, settings, relaxation, **kwargs):
        time.sleep(3600)


    if __name__ == "__main__":
        design = make_design(registry.load().get("threshold-geometry"), {"clearance": "0.2"}, {})
        table = pd.DataFrame({"distance": [1.0, 2.0, 3.0], "attempts": [100, 100, 100],
                              "successes": [90, 70, 50]})
        harness.fit_relaxations(design, design.validate(table), 1, engine.Settings(), 2,
                                lambda _: None, fitter=never_done)
""")


def _workers_of(parent: int) -> list[int]:
    """Pool workers (multiprocessing spawn children) whose parent is ``parent``."""
    found = []
    for entry in Path("/proc").iterdir():
        if not entry.name.isdigit():
            continue
        try:
            ppid = int((entry / "stat").read_text().rsplit(")", 1)[1].split()[1])
            command = (entry / "cmdline").read_bytes()
        except (OSError, IndexError, ValueError):
            continue
        if ppid == parent and b"spawn_main" in command:
            found.append(int(entry.name))
    return found


def _alive(pid: int) -> bool:
    try:
        stat = Path(f"/proc/{pid}/stat").read_text()
    except OSError:
        return False
    return stat.rsplit(")", 1)[1].split()[0] != "Z"


def _wait_for(condition) -> bool:
    deadline = time.monotonic() + PATIENCE_SECONDS
    while time.monotonic() < deadline:
        if condition():
            return True
        time.sleep(0.2)
    return False


def test_relaxation_workers_exit_when_the_main_process_is_killed(tmp_path):
    script = tmp_path / "relax.py"
    script.write_text(RUN)
    main = subprocess.Popen([sys.executable, str(script)], cwd=tmp_path)
    workers: list[int] = []
    try:
        assert _wait_for(lambda: len(_workers_of(main.pid)) == 2)
        workers = _workers_of(main.pid)
        os.kill(main.pid, signal.SIGKILL)
        main.wait(timeout=PATIENCE_SECONDS)
        assert _wait_for(lambda: not any(_alive(pid) for pid in workers))
    finally:
        main.kill()
        for pid in workers:
            try:
                os.kill(pid, signal.SIGKILL)
            except ProcessLookupError:
                pass
