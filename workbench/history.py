"""The run history: one row per check, compare, calibrate and audit, in SQLite.

Each row records when a run happened, which command, the recipe or model file
and the SHA-256 of its source (a new revision of a model file is a new
hash), the data's SHA-256, the verdicts, the audit's gate outcome and where
the report is. ``workbench history`` lists the rows newest first and shows
how a model's verdicts changed from one revision to the next.

Several runs may finish at once (a team sharing one history file, or one
person running commands in two terminals). Every write is one short
transaction started with ``BEGIN IMMEDIATE`` (it takes the write lock at
once instead of upgrading later, which could deadlock), the database runs in
write-ahead-log mode (readers never block the writer), and a busy timeout
makes a second writer wait instead of failing. SQLite's journal makes a
transaction all or nothing, so a writer killed mid-transaction leaves the
database as it was before.
"""

from __future__ import annotations

import json
import os
import sqlite3
import time
from dataclasses import dataclass, field
from pathlib import Path
from typing import Iterator

from workbench.errors import OutputError

# Default location; ``--history PATH`` or $WORKBENCH_HISTORY chooses another.
DEFAULT_PATH = Path("reports") / "history.sqlite"
ENV_VAR = "WORKBENCH_HISTORY"
# How long a writer waits for another writer's transaction before giving up.
# Rows are written in milliseconds; 30 s covers a slow shared disk. Common practice.
BUSY_TIMEOUT_SECONDS = 30.0
SCHEMA_VERSION = 1
COMMANDS = ("check", "compare", "calibrate", "audit")

_SCHEMA = """
CREATE TABLE IF NOT EXISTS runs (
    id          INTEGER PRIMARY KEY AUTOINCREMENT,
    time        TEXT NOT NULL,
    command     TEXT NOT NULL,
    target      TEXT NOT NULL,
    target_hash TEXT NOT NULL,
    design      TEXT NOT NULL,
    data_path   TEXT NOT NULL,
    data_hash   TEXT NOT NULL,
    seed        INTEGER,
    verdicts    TEXT NOT NULL,
    gates       TEXT,
    report      TEXT NOT NULL
);
CREATE INDEX IF NOT EXISTS runs_target ON runs (target, id);
CREATE INDEX IF NOT EXISTS runs_data ON runs (data_hash, id);
"""


@dataclass
class Entry:
    """One recorded run.

    ``verdicts`` maps assumption keys to verdicts; for a comparison it maps
    each design label to such a mapping. ``gates`` is ``"pass"`` or
    ``"fail"`` for an audit, None otherwise.
    """

    command: str
    target: str
    target_hash: str
    design: str
    data_path: str
    data_hash: str
    seed: int | None
    verdicts: dict
    report: str
    gates: str | None = None
    time: str = ""
    id: int | None = None
    extra: dict = field(default_factory=dict)

    def to_dict(self) -> dict:
        return {"id": self.id, "time": self.time, "command": self.command, "target": self.target,
                "target_hash": self.target_hash, "design": self.design, "data_path": self.data_path,
                "data_hash": self.data_hash, "seed": self.seed, "verdicts": self.verdicts,
                "gates": self.gates, "report": self.report}


def check_entry(command: str, design, summary: dict, report, gates: str | None = None) -> Entry:
    """The history row of a single-design run (check, calibrate or audit).

    The target is the recipe name, or the model file's full path; its hash
    is the SHA-256 of the file that defines it.
    """
    from workbench.fitcache import source_sha256

    is_file = bool(getattr(design, "is_model_file", False))
    return Entry(
        command=command,
        target=str(design.recipe.source) if is_file else design.name,
        target_hash=source_sha256(design),
        design=design.label(),
        data_path=summary["data"]["path"],
        data_hash=summary["data"]["sha256"],
        seed=summary.get("seed"),
        verdicts={a["key"]: a["verdict"] for a in summary.get("assumptions") or []},
        report=str(report),
        gates=gates,
    )


def default_path() -> Path:
    """$WORKBENCH_HISTORY when set, else ``reports/history.sqlite``."""
    return Path(os.environ.get(ENV_VAR) or DEFAULT_PATH)


def connect(path: str | Path) -> sqlite3.Connection:
    """Open (creating when needed) the history database in WAL mode with a busy timeout."""
    path = Path(path)
    try:
        path.parent.mkdir(parents=True, exist_ok=True)
        # Autocommit mode: transactions are started explicitly below.
        conn = sqlite3.connect(path, timeout=BUSY_TIMEOUT_SECONDS, isolation_level=None)
        conn.execute(f"PRAGMA busy_timeout = {int(BUSY_TIMEOUT_SECONDS * 1000)}")
        conn.execute("PRAGMA journal_mode = WAL")
        # In WAL mode a commit that is synced at NORMAL survives a killed
        # process; only a power cut may lose the last commits.
        conn.execute("PRAGMA synchronous = NORMAL")
        version = conn.execute("PRAGMA user_version").fetchone()[0]
        if version == 0:
            with transaction(conn):
                if conn.execute("PRAGMA user_version").fetchone()[0] == 0:
                    for statement in filter(str.strip, _SCHEMA.split(";")):
                        conn.execute(statement)
                    conn.execute(f"PRAGMA user_version = {SCHEMA_VERSION}")
        elif version > SCHEMA_VERSION:
            conn.close()
            raise OutputError(f"history {str(path)!r}: written by a newer workbench (schema "
                              f"{version}; this one reads {SCHEMA_VERSION})")
    except sqlite3.DatabaseError as err:
        raise OutputError(f"history {str(path)!r}: expected a workbench history database; "
                          f"found an unusable file ({err})") from None
    return conn


class transaction:
    """``with transaction(conn):`` runs a ``BEGIN IMMEDIATE`` ... ``COMMIT`` block
    (``ROLLBACK`` on any error)."""

    def __init__(self, conn: sqlite3.Connection):
        self.conn = conn

    def __enter__(self):
        self.conn.execute("BEGIN IMMEDIATE")
        return self.conn

    def __exit__(self, kind, value, tb):
        self.conn.execute("COMMIT" if kind is None else "ROLLBACK")
        return False


def record(path: str | Path, entry: Entry) -> int:
    """Append one run to the history; return its row id."""
    entry.time = entry.time or _now()
    conn = connect(path)
    try:
        with transaction(conn):
            cursor = conn.execute(
                "INSERT INTO runs (time, command, target, target_hash, design, data_path, data_hash,"
                " seed, verdicts, gates, report) VALUES (?, ?, ?, ?, ?, ?, ?, ?, ?, ?, ?)",
                (entry.time, entry.command, entry.target, entry.target_hash, entry.design,
                 entry.data_path, entry.data_hash, entry.seed,
                 json.dumps(entry.verdicts, sort_keys=True), entry.gates, entry.report),
            )
            entry.id = int(cursor.lastrowid)
    finally:
        conn.close()
    return entry.id


def runs(path: str | Path, target: str | None = None, data_hash: str | None = None,
         command: str | None = None, limit: int | None = None) -> list[Entry]:
    """Recorded runs, newest first.

    ``target`` matches the recipe name or model file (a model file also by its
    file name alone); ``data_hash`` matches a prefix of the data's SHA-256.
    """
    if not Path(path).exists():
        return []
    clauses, values = [], []
    if target:
        # A comparison lists several designs in its target, separated by " | ".
        clauses.append("(target = ? OR design = ? OR target LIKE ? ESCAPE '\\' "
                       "OR (' | ' || target || ' | ') LIKE ? ESCAPE '\\')")
        values += [target, target, f"%/{_like(target)}", f"% | {_like(target)} | %"]
    if data_hash:
        clauses.append("data_hash LIKE ? ESCAPE '\\'")
        values.append(_like(data_hash.lower()) + "%")
    if command:
        clauses.append("command = ?")
        values.append(command)
    sql = "SELECT * FROM runs" + (" WHERE " + " AND ".join(clauses) if clauses else "")
    sql += " ORDER BY id DESC" + (f" LIMIT {int(limit)}" if limit else "")
    conn = connect(path)
    try:
        conn.row_factory = sqlite3.Row
        return [_entry(row) for row in conn.execute(sql, values)]
    finally:
        conn.close()


def targets(path: str | Path) -> list[str]:
    """Every recipe name, design and model file (also by file name) the history holds."""
    if not Path(path).exists():
        return []
    conn = connect(path)
    try:
        found = {name for pair in conn.execute("SELECT DISTINCT target, design FROM runs")
                 for text in pair for name in str(text).split(" | ")}
    finally:
        conn.close()
    return sorted(found | {Path(name).name for name in found})


def _like(text: str) -> str:
    # Wildcards in a user's text match themselves only (ESCAPE '\\' above).
    return text.replace("\\", "\\\\").replace("%", "\\%").replace("_", "\\_")


def _entry(row) -> Entry:
    return Entry(command=row["command"], target=row["target"], target_hash=row["target_hash"],
                 design=row["design"], data_path=row["data_path"], data_hash=row["data_hash"],
                 seed=row["seed"], verdicts=json.loads(row["verdicts"]), report=row["report"],
                 gates=row["gates"], time=row["time"], id=row["id"])


@dataclass
class Revision:
    """A model revision (source hash) and its verdicts at its first recorded run."""

    target: str
    target_hash: str
    first_seen: str
    run_id: int
    verdicts: dict
    changed: dict  # assumption -> (before, after) against the previous revision


def changes(path: str | Path, target: str | None = None) -> list[Revision]:
    """How each model's verdicts changed across its revisions, oldest first.

    Runs of a target are grouped by the SHA-256 of its source; each revision
    shows the verdicts of its latest single-design run (check or audit) and
    which verdicts differ from the previous revision's.
    """
    entries = [e for e in reversed(runs(path, target=target)) if e.command in ("check", "audit")]
    latest: dict[tuple[str, str], Entry] = {}
    order: list[tuple[str, str]] = []
    first: dict[tuple[str, str], Entry] = {}
    for e in entries:
        key = (e.target, e.target_hash)
        if key not in latest:
            order.append(key)
            first[key] = e
        latest[key] = e
    out: list[Revision] = []
    previous: dict[str, dict] = {}
    for key in order:
        verdicts = latest[key].verdicts
        before = previous.get(key[0])
        changed = {}
        if before is not None:
            for a in sorted(set(before) | set(verdicts)):
                if before.get(a) != verdicts.get(a):
                    changed[a] = (before.get(a), verdicts.get(a))
        out.append(Revision(key[0], key[1], first[key].time, latest[key].id, verdicts, changed))
        previous[key[0]] = verdicts
    return out


def _now() -> str:
    return time.strftime("%Y-%m-%dT%H:%M:%SZ", time.gmtime())


# --- lines for the terminal --------------------------------------------------------------


COUNTED = ("broken", "doubtful", "holds", "unchecked")


def verdict_counts(verdicts: dict) -> str:
    """``2 broken, 1 doubtful, 4 holds`` (a comparison: one such text per design)."""
    if verdicts and all(isinstance(v, dict) for v in verdicts.values()):
        return "; ".join(f"{label}: {verdict_counts(v)}" for label, v in verdicts.items())
    counts = {c: sum(1 for v in verdicts.values() if v == c) for c in COUNTED}
    return ", ".join(f"{n} {c}" for c, n in counts.items() if n) or "no verdicts"


def line(entry: Entry) -> str:
    """One terminal line per run."""
    when = entry.time.replace("T", " ").rstrip("Z")
    gate = f"  gates {entry.gates}" if entry.gates else ""
    return (f"{entry.id:>4}  {when}  {entry.command:<9}  {entry.design}  "
            f"[model {entry.target_hash[:8] or '-'} data {entry.data_hash[:8]}]{gate}  "
            f"{verdict_counts(entry.verdicts)}  {entry.report}")


def change_lines(revisions: list[Revision]) -> Iterator[str]:
    """Per revision: what changed against the one before, or its verdicts if first."""
    seen: set[str] = set()
    for r in revisions:
        head = f"{r.first_seen.replace('T', ' ').rstrip('Z')}  {r.target}  revision {r.target_hash[:8]}"
        if r.target not in seen:
            seen.add(r.target)
            yield f"{head}  (first seen, run {r.run_id}): {verdict_counts(r.verdicts)}"
        elif r.changed:
            moves = ", ".join(f"{a} {b or '-'} -> {c or '-'}" for a, (b, c) in r.changed.items())
            yield f"{head}  (run {r.run_id}): {moves}"
        else:
            yield f"{head}  (run {r.run_id}): no verdict changed"
