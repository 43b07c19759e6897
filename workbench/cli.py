"""The ``workbench`` command line.

Bad usage or bad data: one line on stderr, exit status 2, no traceback.
"""

from __future__ import annotations

import argparse
import os
import shlex
import sys
import textwrap

from workbench.errors import OptionError, WorkbenchError

PROG = "workbench"


class _Parser(argparse.ArgumentParser):
    """argparse with one-line errors and exit status 2."""

    def error(self, message):
        raise OptionError(f"{self.prog}: {message}")


def _key_value(text: str) -> tuple[str, str]:
    key, sep, value = text.partition("=")
    if not sep or not key.strip():
        raise argparse.ArgumentTypeError(f"expected KEY=VALUE; found {text!r}")
    return key.strip(), value.strip()


def _positive_int(text: str) -> int:
    try:
        value = int(text)
    except ValueError:
        raise argparse.ArgumentTypeError(f"expected a whole number; found {text!r}") from None
    if value < 0:
        raise argparse.ArgumentTypeError(f"expected a number >= 0; found {text!r}")
    return value


def _common_run(p: argparse.ArgumentParser) -> None:
    p.add_argument("--seed", type=_positive_int, default=1, help="seed for every random step (default 1)")
    p.add_argument("--out", help="output folder (default: a new folder under reports/)")
    p.add_argument("--force", action="store_true", help="allow writing into a folder that holds files")
    p.add_argument("--quiet", action="store_true", help="no progress output")
    p.add_argument("--recipes", action="append", default=[], metavar="DIR",
                   help="extra recipe folder (repeatable; also $WORKBENCH_RECIPES)")
    p.add_argument("--draws", type=_positive_int, default=1000, help="posterior draws per chain")
    p.add_argument("--tune", type=_positive_int, default=1000, help="warm-up draws per chain")
    p.add_argument("--chains", type=_positive_int, default=4, help="number of chains")


def build_parser() -> argparse.ArgumentParser:
    parser = _Parser(prog=PROG, description="Check which assumption of a generative model holds.")
    sub = parser.add_subparsers(dest="command", parser_class=_Parser, metavar="COMMAND")

    p = sub.add_parser("recipes", help="list recipes with their columns, options and assumptions")
    p.add_argument("--recipes", action="append", default=[], metavar="DIR")

    p = sub.add_parser("check", help="run the full check of a design on a table")
    p.add_argument("target", metavar="RECIPE_OR_MODEL_FILE")
    p.add_argument("--data", required=True, help="CSV or Parquet table")
    p.add_argument("--set", dest="options", action="append", default=[], type=_key_value,
                   metavar="KEY=VALUE", help="a design option (repeatable)")
    p.add_argument("--prior", dest="priors", action="append", default=[], metavar="PARAM=DIST(ARGS)",
                   help="override a prior, e.g. spread=halfnormal(0.05) (repeatable)")
    p.add_argument("--sbc", type=_positive_int, default=0, metavar="N",
                   help="simulation-based calibration replicates (default 0: none)")
    p.add_argument("--workers", type=_positive_int, default=None, help="local worker processes")
    p.add_argument("--cluster", default=None, metavar="ADDRESS", help="Dask scheduler address")
    p.add_argument("--no-relax", dest="relax", action="store_false", help="skip the relaxation fits")
    _common_run(p)

    p = sub.add_parser("demo", help="simulate an invented scenario, check it and print the verdicts")
    p.add_argument("--recipe", default="threshold-geometry", help="which recipe's scenario")
    _common_run(p)
    return parser


def main(argv: list[str] | None = None) -> int:
    argv = sys.argv[1:] if argv is None else argv
    try:
        args = build_parser().parse_args(argv)
        if args.command is None:
            build_parser().print_help()
            return 2
        return COMMANDS[args.command](args)
    except WorkbenchError as err:
        print(f"{PROG}: error: {err}", file=sys.stderr)
        return err.exit_code
    except KeyboardInterrupt:
        print(f"{PROG}: interrupted; finished files are kept", file=sys.stderr)
        return 130


def _say(args):
    if args.quiet:
        return lambda _: None
    return lambda message: print(f"· {message}", file=sys.stderr, flush=True)


def _settings(args):
    from workbench.engine import Settings

    if args.chains < 1 or args.draws < 10:
        raise OptionError(f"--chains must be >= 1 and --draws >= 10; found {args.chains} and {args.draws}")
    return Settings(draws=args.draws, tune=args.tune, chains=args.chains)


def _priors(texts: list[str]) -> dict[str, str]:
    from workbench.priors import parse_override

    out = {}
    for text in texts:
        name, spec = parse_override(text)
        out[name] = str(spec)
    return out


def cmd_recipes(args) -> int:
    from workbench import registry

    reg = registry.load(args.recipes)
    for name in sorted(reg.recipes):
        r = reg.recipes[name]
        print(f"{name}  ({r.source})")
        print(textwrap.indent(textwrap.fill(r.summary, 76), "    "))
        cols = ", ".join(c.name + ("" if c.required else " (optional)") for c in r.columns)
        print(f"    columns:     {cols}")
        for o in r.options:
            default = "" if o.default is _required() else f" [default {o.default}]"
            print(f"    option       {o.name}: {o.meaning}{default}")
        for p in r.parameters:
            print(f"    parameter    {p.name} ~ {p.prior}: {p.meaning}")
        for a in r.assumptions:
            extra = []
            if a.statistic:
                extra.append(f"statistic {a.statistic.name}")
            if a.relaxation:
                extra.append(f"relaxation {a.relaxation.parameter}")
            print(f"    assumption   {a.key}: {a.statement} ({'; '.join(extra)})")
        print()
    for problem in reg.problems:
        print(f"{PROG}: could not load recipe file {problem}", file=sys.stderr)
    return 0


def _required():
    from workbench.recipe import REQUIRED

    return REQUIRED


def cmd_check(args) -> int:
    from workbench import api

    result = api.check(
        args.target, args.data, options=dict(args.options), priors=_priors(args.priors),
        seed=args.seed, out=args.out, force=args.force, sbc=args.sbc, workers=args.workers,
        cluster=args.cluster, settings=_settings(args), relax=args.relax,
        recipe_folders=args.recipes, say=_say(args), progress=not args.quiet and sys.stderr.isatty(),
        command=" ".join([PROG] + [shlex.quote(a) for a in sys.argv[1:]]),
    )
    print_verdicts(result.summary)
    print(f"report: {result.files['report']}")
    return 0


def cmd_demo(args) -> int:
    from workbench import demo

    result = demo.run(args.recipe, seed=args.seed, out=args.out, force=args.force,
                      settings=_settings(args), recipe_folders=args.recipes, say=_say(args),
                      progress=not args.quiet and sys.stderr.isatty())
    print_verdicts(result.summary)
    print(f"data:   {result.run.data_info.path}")
    print(f"report: {result.files['report']}")
    return 0


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
        print(line)


COMMANDS = {"recipes": cmd_recipes, "check": cmd_check, "demo": cmd_demo}


if __name__ == "__main__":  # pragma: no cover
    sys.exit(main())
