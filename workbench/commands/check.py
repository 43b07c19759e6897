"""``workbench check``: the full check of a design on a table."""

from __future__ import annotations

from workbench import commands as common

NAME = "check"
HELP = "run the full check of a design on a table"


def add_arguments(p) -> None:
    p.add_argument("target", metavar="RECIPE_OR_MODEL_FILE")
    p.add_argument("--data", required=True, help="CSV or Parquet table")
    common.add_design_arguments(p)
    p.add_argument("--sbc", type=common.whole_number, default=0, metavar="N",
                   help="simulation-based calibration replicates (default 0: none)")
    p.add_argument("--workers", type=common.whole_number, default=None, help="local worker processes")
    p.add_argument("--cluster", default=None, metavar="ADDRESS", help="Dask scheduler address")
    p.add_argument("--no-relax", dest="relax", action="store_false", help="skip the relaxation fits")
    common.add_run_arguments(p)


def run(args) -> int:
    from workbench import api

    result = api.check(
        args.target, args.data, options=dict(args.options), priors=common.priors(args.priors),
        seed=args.seed, out=args.out, force=args.force, sbc=args.sbc, workers=args.workers,
        cluster=args.cluster, settings=common.settings(args), relax=args.relax,
        recipe_folders=args.recipes, say=common.say(args), progress=common.show_progress(args),
        command=common.command_line(),
    )
    common.print_verdicts(result.summary)
    print(f"report: {result.files['report']}")
    return 0
