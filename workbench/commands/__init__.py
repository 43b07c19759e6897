"""Command modules; arguments and helpers shared between them."""

from __future__ import annotations

import argparse
import shlex
import sys
import textwrap


def key_value(text: str) -> tuple[str, str]:
    key, sep, value = text.partition("=")
    if not sep or not key.strip():
        raise argparse.ArgumentTypeError(f"expected KEY=VALUE; found {text!r}")
    return key.strip(), value.strip()


def _at_least(text: str, low: int, expected: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected {expected}; found {text!r}") from None
    if value < low:
        raise argparse.ArgumentTypeError(f"expected {expected}; found {text!r}")
    return value


def whole_number(text: str) -> int:
    """A whole number >= 0."""
    return _at_least(text, 0, "a whole number >= 0")


def positive_number(text: str) -> int:
    """A whole number >= 1 (a count of lines, replicates, processes)."""
    return _at_least(text, 1, "a whole number >= 1")


def seed_number(text: str) -> int:
    """A seed on the command line; the range is the one plan files and the API accept."""
    from workbench.errors import OptionError
    from workbench.plans import check_seed

    try:
        return check_seed(int(text), "seed")
    except (ValueError, OptionError):
        raise argparse.ArgumentTypeError(
            f"expected a whole number from 0 to 2^63 - 1; found {text!r}") from None


def probability(text: str) -> float:
    try:
        value = float(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a number above 0 and below 1; found {text!r}") from None
    if not 0 < value < 1:
        raise argparse.ArgumentTypeError(f"expected a number above 0 and below 1; found {text!r}")
    return value


def add_run_arguments(p: argparse.ArgumentParser) -> None:
    """Options every command that fits models shares."""
    p.add_argument("--seed", type=seed_number, default=1, help="seed for every random step (default 1)")
    p.add_argument("--out", help="output folder (default: a new folder under reports/)")
    p.add_argument("--force", action="store_true", help="allow writing into a folder that holds files")
    p.add_argument("--quiet", action="store_true", help="no progress output")
    p.add_argument("--recipes", action="append", default=[], metavar="DIR",
                   help="extra recipe folder (repeatable; also $WORKBENCH_RECIPES)")
    p.add_argument("--draws", type=whole_number, default=1000, help="posterior draws per chain")
    p.add_argument("--tune", type=whole_number, default=1000, help="warm-up draws per chain")
    p.add_argument("--chains", type=whole_number, default=4, help="number of chains")
    p.add_argument("--target-accept", type=probability, default=None, metavar="RATE",
                   help="acceptance rate the step size adapts to (default 0.8; 0.9-0.99 for "
                        "divergences with no pattern)")


def add_design_arguments(p: argparse.ArgumentParser) -> None:
    p.add_argument("--set", dest="options", action="append", default=[], type=key_value,
                   metavar="KEY=VALUE", help="a design option (repeatable)")
    p.add_argument("--prior", dest="priors", action="append", default=[], metavar="PARAM=DIST(ARGS)",
                   help="override a prior, e.g. spread=halfnormal(0.05) (repeatable)")


def say(args):
    """Progress lines on stderr unless --quiet."""
    if getattr(args, "quiet", False):
        return lambda _: None
    return lambda message: print(f"· {message}", file=sys.stderr, flush=True)


def show_progress(args) -> bool:
    """Progress of long work unless --quiet: a bar on a terminal, plain lines in logs."""
    return not getattr(args, "quiet", False)


def priors(texts: list[str]) -> dict[str, str]:
    from workbench.priors import parse_override

    out = {}
    for text in texts:
        name, spec = parse_override(text)
        out[name] = str(spec)
    return out


def command_line() -> str:
    return " ".join(["workbench"] + [shlex.quote(a) for a in sys.argv[1:]])


SYMBOLS = {"holds": "✓", "doubtful": "△", "broken": "✕", "unchecked": "○"}


def print_verdicts(summary: dict) -> None:
    """The verdict table in the terminal, most urgent first."""
    rows = [(a["key"], a["verdict"], a["advice"]) for a in summary["assumptions"]]
    width = max(len(k) for k, _, _ in rows)
    print(f"{summary['recipe']}: {len(rows)} assumptions")
    for key, verdict, advice in rows:
        line = f"  {SYMBOLS[verdict]} {key:<{width}}  {verdict:<9}"
        if verdict in ("broken", "doubtful") and advice:
            line += "  " + textwrap.shorten(advice, 90)
        print(line.rstrip())
