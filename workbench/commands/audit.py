"""``workbench audit``: run a plan's check and hold it to sign-off gates.

Exit status: 0 when every gate passes (or is waived with a reason), 1 when a
gate fails, 2 for a bad plan or bad data.
"""

from __future__ import annotations

from workbench import commands as common
from workbench.commands.compare import add_store_arguments, cache_of

NAME = "audit"
HELP = "audit a model against sign-off gates from a TOML plan (exit 1 when a gate fails)"
GATE_FAILED = 1


def add_arguments(p) -> None:
    p.add_argument("plan", metavar="PLAN.toml", help="plan file: data, recipe or model file, seed, gates, waivers")
    p.add_argument("--out", help="output folder (default: a new folder under reports/)")
    p.add_argument("--force", action="store_true", help="allow writing into a folder that holds files")
    p.add_argument("--quiet", action="store_true", help="no progress output")
    p.add_argument("--workers", type=common.whole_number, default=None, help="local worker processes")
    p.add_argument("--cluster", default=None, metavar="ADDRESS", help="Dask scheduler address")
    p.add_argument("--recipes", action="append", default=[], metavar="DIR",
                   help="extra recipe folder (repeatable; also $WORKBENCH_RECIPES)")
    add_store_arguments(p)


def run(args) -> int:
    from workbench.audit import WAIVED, audit

    result = audit(
        args.plan, out=args.out, force=args.force, workers=args.workers, cluster=args.cluster,
        cache=cache_of(args), history=args.history or True, recipe_folders=args.recipes,
        say=common.say(args), progress=common.show_progress(args), command=common.command_line(),
    )
    width = max(len(g["name"]) for g in result.doc["gates"])
    for g in result.doc["gates"]:
        print(f"  {g['status']:<8} {g['name']:<{width}}  {g['evidence']}")
        if g["waiver"] and g["status"] == WAIVED:
            print(f"  {'':<8} {'':<{width}}  waived: {g['waiver']}")
    if result.passed:
        print("audit passed")
    else:
        print(f"audit failed: {', '.join(result.failed)}")
    print(f"report: {result.files['report']}")
    return 0 if result.passed else GATE_FAILED
