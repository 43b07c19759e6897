"""``workbench history``: one line per recorded run, newest first."""

from __future__ import annotations

from workbench import commands as common

NAME = "history"
HELP = "list recorded runs, newest first, or how a model's verdicts changed across revisions"


def add_arguments(p) -> None:
    p.add_argument("--history", metavar="PATH", default=None,
                   help="run history database (default reports/history.sqlite or $WORKBENCH_HISTORY)")
    p.add_argument("--recipe", metavar="NAME", help="only runs of this recipe or model file")
    p.add_argument("--data", metavar="SHA256", help="only runs on data whose SHA-256 starts so")
    p.add_argument("--command", dest="which", choices=("check", "compare", "calibrate", "audit"),
                   help="only runs of this command")
    p.add_argument("--limit", type=common.positive_number, default=None, metavar="N", help="at most N lines")
    p.add_argument("--changes", action="store_true",
                   help="per model revision (source SHA-256), the verdicts that changed")


def run(args) -> int:
    from pathlib import Path

    from workbench import history

    path = Path(args.history) if args.history else history.default_path()
    if args.changes:
        lines = list(history.change_lines(history.changes(path, target=args.recipe)))
    else:
        lines = [history.line(e) for e in history.runs(path, target=args.recipe, data_hash=args.data,
                                                       command=args.which, limit=args.limit)]
    if not lines:
        hint = ""
        if args.recipe:
            from workbench import registry
            from workbench.errors import did_you_mean

            hint = did_you_mean(args.recipe, [*history.targets(path), *registry.load().recipes])
        matching = " matching the filters" if args.recipe or args.data or args.which else ""
        print(f"no recorded runs in {path}{matching}{hint}")
    for text in lines:
        print(text)
    return 0
