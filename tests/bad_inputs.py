"""Bad input, case by case: what a user gives and the one line they must get back.

Each case is one row: its class (what kind of mistake), the command-line
arguments, the files the command reads, the expected exit status and a
fragment of the one line on standard error. ``{tmp}`` in an argument or a
file name is the case's own folder. Every case stops at the boundary, before
any sampling, so walking the whole table takes seconds
(``tests/test_bad_input_sweep.py``).
"""

from __future__ import annotations

from dataclasses import dataclass, field

USAGE = 2  # the exit status of bad usage or bad data


@dataclass(frozen=True)
class Case:
    klass: str
    args: tuple[str, ...]
    fragment: str
    files: dict[str, str | bytes] = field(default_factory=dict)
    exit_code: int = USAGE

    @property
    def name(self) -> str:
        return f"{self.klass}: {self.fragment[:50]}"


GOOD = "distance,attempts,successes\n1,100,90\n2,100,70\n3,100,50\n"
TABLE = {"t.csv": GOOD}
CHECK = ("check", "threshold-geometry", "--data", "{tmp}/t.csv", "--set", "clearance=0.2",
         "--out", "{tmp}/out")
CALIBRATE = ("calibrate", "threshold-geometry", "--data", "{tmp}/t.csv", "--set", "clearance=0.2",
             "--workers", "1", "--history", "{tmp}/h.sqlite", "--quiet")
UNITS = ("check", "timing-curve", "--data", "{tmp}/t.csv", "--out", "{tmp}/out")
UNIT_OUTCOMES = ("check", "competing-risks", "--data", "{tmp}/t.csv", "--set", "outcomes=solved,withdrawn",
                 "--out", "{tmp}/out")
PARQUET_BYTES = b"PAR1\x15\x04\x15\x10\x15\x14L\x15\x02\x15\x00\x12\x00\x00PAR1"


def check_table(text: str | bytes, name: str = "t.csv") -> dict:
    return {name: text}


CASES = [
    # --- priors that PyMC would accept and the sampler would crash on or misuse
    Case("prior argument out of its domain", (*CHECK, "--prior", "spread=lognormal(-4,-0.5)"),
         "--prior spread: sigma of lognormal must be a number above 0; found -0.5", TABLE),
    Case("prior with too few arguments", (*CHECK, "--prior", "spread=lognormal(-4)"),
         "lognormal takes 2 argument(s) (mu, sigma); found 1", TABLE),
    Case("prior off the parameter's support", (*CHECK, "--prior", "spread=normal(0,1)"),
         "spread lives on (0, inf); normal(0,1) puts draws outside it", TABLE),
    Case("prior off the parameter's support", (*CHECK, "--prior", "extra_failure=halfnormal(1)"),
         "extra_failure lives on (0, 1)", TABLE),
    Case("prior bounds in the wrong order", (*CHECK, "--prior", "spread=uniform(2,1)"),
         "uniform(lower, upper) needs lower < upper", TABLE),
    Case("prior off the parameter's support", ("check", "{tmp}/plan.toml"),
         "spread lives on (0, inf)",
         {**TABLE, "plan.toml": 'data = "t.csv"\nrecipe = "threshold-geometry"\n[options]\n'
                                'clearance = 0.2\n[priors]\nspread = "normal(0,1)"\n'}),
    # --- data lost or left behind
    Case("a finished result is kept",
         ("calibrate", "threshold-geometry", "--data", "{tmp}/t.csv", "--set", "clearance=0.2",
          "--sims", "5", "--out", "{tmp}/cal", "--workers", "1", "--quiet", "--history", "{tmp}/h.sqlite"),
         "holds a finished calibration of 2 replicates; expected one of 5",
         {**TABLE, "cal/calibration.jsonl": '{"format": "workbench.calibration/1"}\n',
          "cal/calibration.json": '{"calibration": {"sims": 2}}'}),
    Case("seed out of range", (*CHECK, "--seed", "99999999999999999999999"),
         "argument --seed: expected a whole number from 0 to 2^63 - 1", TABLE),
    Case("seed out of range", (*CHECK, "--seed", "-4"), "from 0 to 2^63 - 1", TABLE),
    Case("seed out of range", ("check", "{tmp}/plan.toml"),
         "plan.toml' seed: expected a whole number from 0 to 2^63 - 1; found 99999999999999999999999",
         {**TABLE, "plan.toml": 'data = "t.csv"\nrecipe = "threshold-geometry"\n'
                                'seed = 99999999999999999999999\n[options]\nclearance = 0.2\n'}),
    Case("seed out of range", (*CALIBRATE, "--sims", "1", "--seed", str(2**63)), "from 0 to 2^63 - 1", TABLE),
    # --- tracebacks and silent exits
    Case("output is a file", ("check", "threshold-geometry", "--data", "{tmp}/t.csv", "--set",
                              "clearance=0.2", "--out", "{tmp}/t.csv"),
         "output folder '{tmp}/t.csv': expected a folder (new or empty); found a file", TABLE),
    Case("model file exits", ("check", "{tmp}/model.py", "--data", "{tmp}/t.csv"),
         "model.py:3: loading the model file raised SystemExit (sys.exit(3))",
         {**TABLE, "model.py": "import sys\n\nsys.exit(3)\n"}),
    Case("no command", (), "expected a command (audit, calibrate, check, compare, demo, history, recipes)"),
    Case("file format", CHECK, "expected a UTF-8 CSV or a Parquet file; it looks like text in another "
                               "encoding than UTF-8 (byte 0xe9",
         check_table("distance,attempts,successes,group\n1,10,3,caf\xe9\n".encode("latin-1"))),
    Case("file format", CHECK, "expected a UTF-8 CSV or a Parquet file; it looks like a Parquet file",
         check_table(PARQUET_BYTES)),
    Case("file format", ("check", "threshold-geometry", "--data", "{tmp}/t.parquet", "--set", "clearance=0.2"),
         "expected a Parquet file; it looks like UTF-8 text", check_table(GOOD, "t.parquet")),
    Case("file format", CHECK, "expected a UTF-8 CSV or a Parquet file; found an empty file", check_table("")),
    Case("file format", CHECK, "it looks like a ZIP archive, such as an Excel .xlsx workbook",
         check_table(b"PK\x03\x04\x14\x00\x00\x00")),
    Case("file format", CHECK, "expected a CSV file with as many fields on every line as its header; "
                               "found 4 fields on line 3 where the header has 3",
         check_table("distance,attempts,successes\n1,10,3\n2,10,3,5\n")),
    # --- accepted though wrong
    Case("duplicated header", CHECK, "expected each column name once in the header; found 'successes' twice",
         check_table("distance,attempts,successes,successes\n1,10,3,4\n")),
    Case("value beyond the arithmetic", CHECK,
         "column 'distance' row 2 (line 3): expected a number within ±2^53; found 1e+300",
         check_table("distance,attempts,successes\n1,100,90\n1e300,100,70\n")),
    Case("value beyond the physics", CHECK, "column 'distance' row 1 (line 2): expected a value > 0; found -2",
         check_table("distance,attempts,successes\n-2,10,3\n")),
    Case("value beyond the physics", ("check", "timing-curve", "--data", "{tmp}/t.csv", "--out", "{tmp}/out"),
         "column 'age' row 2 (line 3): expected an age >= 0; found -1",
         check_table("cohort,age,exposed,events\nA,1,10,2\nA,-1,10,3\n")),
    # --- one row per unit (timing-curve and competing-risks)
    Case("unit time not positive", UNITS, "column 'time' row 2 (line 3): expected a time > 0",
         check_table("time,event\n3,1\n0,0\n")),
    Case("unit entry after time", UNITS,
         "column 'entry' row 1 (line 2): expected entry < time; found entry 5 >= time 3",
         check_table("time,event,entry\n3,1,5\n4,0,1\n")),
    Case("unit entry negative", UNITS, "column 'entry' row 2 (line 3): expected an entry time >= 0",
         check_table("time,event,entry\n3,1,0\n4,0,-1\n")),
    Case("unit event not 0/1", UNITS,
         "column 'event' row 2 (line 3): expected 1 (the event happened at time) or 0",
         check_table("time,event\n3,1\n4,2\n")),
    Case("unit without events", UNITS, "column 'event': expected at least one unit with the event",
         check_table("time,event\n3,0\n4,0\n")),
    Case("unit layout mixed with counts", UNITS, "found both 'time' and 'exposed'",
         check_table("time,event,exposed\n3,1,10\n")),
    Case("unit group differs within cohort", UNITS,
         "column 'group' row 2 (line 3): 'b' differs from 'a' given for cohort 'c1'",
         check_table("time,event,cohort,group\n3,1,c1,a\n4,0,c1,b\n")),
    Case("unknown outcome name", UNIT_OUTCOMES,
         "column 'outcome' row 2 (line 3): expected one of solved, withdrawn or an empty cell "
         "(last seen without an outcome); found 'lost'",
         check_table("time,outcome\n3,solved\n4,lost\n5,\n")),
    Case("unit time missing", UNIT_OUTCOMES, "column 'time' row 1 (line 2): expected a finite number",
         check_table("time,outcome\n,solved\n4,withdrawn\n")),
    Case("limit not positive", ("history", "--history", "{tmp}/h.sqlite", "--limit", "-1"),
         "history: argument --limit: expected a whole number >= 1; found '-1'"),
    Case("limit not positive", ("history", "--history", "{tmp}/h.sqlite", "--limit", "0"),
         "expected a whole number >= 1; found '0'"),
    # --- exact output
    Case("usage prefix", ("--bogus",), "workbench: error: unrecognized arguments: --bogus"),
    Case("usage prefix", ("check",), "workbench: error: check: the following arguments are required"),
    Case("row and line", CHECK, "column 'successes' row 2 (line 3): 212 > attempts 200",
         check_table("distance,attempts,successes\n1,100,90\n2,200,212\n")),
    Case("row and line", CHECK, "column 'attempts' row 1 (line 2): expected a finite number; found 'many'",
         check_table("distance,attempts,successes\n1,many,90\n")),
    # --- bad input the workbench already refused
    Case("missing column", CHECK, "needs column 'attempts'; did you mean 'attempt'?",
         check_table("distance,attempt,successes\n1,100,90\n")),
    Case("bad count", CHECK, "column 'successes' row 1 (line 2): expected a count >= 0; found -3",
         check_table("distance,attempts,successes\n1,100,-3\n")),
    Case("bad count", CHECK, "column 'attempts' row 1 (line 2): expected a whole count; found 10.5",
         check_table("distance,attempts,successes\n1,10.5,3\n")),
    Case("no rows", CHECK, "expected at least one data row", check_table("distance,attempts,successes\n")),
    Case("unknown recipe", ("check", "threshold-geometri", "--data", "{tmp}/t.csv"),
         "did you mean 'threshold-geometry'", TABLE),
    Case("bad option", (*CHECK, "--set", "colour=red"), "has no option 'colour'", TABLE),
    Case("bad option", ("check", "threshold-geometry", "--data", "{tmp}/t.csv", "--set", "clearance=wide"),
         "found 'wide'", TABLE),
    Case("bad option", (*CHECK, "--target-accept", "1.5"),
         "--target-accept: expected a number above 0 and below 1", TABLE),
    Case("bad prior", (*CHECK, "--prior", "spread=halfnormal(__import__)"), "must be numbers", TABLE),
    Case("bad prior", (*CHECK, "--prior", "spred=halfnormal(0.1)"), "did you mean 'spread'", TABLE),
    Case("missing file", ("check", "threshold-geometry", "--data", "{tmp}/none.csv", "--set", "clearance=0.2"),
         "data file '{tmp}/none.csv': expected a readable CSV or Parquet file; found none"),
    Case("missing argument", ("check", "threshold-geometry"), "--data"),
    Case("folder holds a run", CHECK, "already holds files",
         {**TABLE, "out/report.html": "earlier work"}),
    Case("not a history", ("history", "--history", "{tmp}/h.sqlite"), "expected a workbench history database",
         {"h.sqlite": "not a database, just text\n" * 100}),
    Case("missing model file", ("check", "{tmp}/absent.py", "--data", "{tmp}/t.csv"),
         "expected a readable Python file; found none", TABLE),
]
