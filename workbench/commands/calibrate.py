"""``workbench calibrate``: simulation-based calibration of a design on a table's covariates.

Rerunning the same command with the same ``--out`` continues from the
folder's checkpoint (no ``--force`` needed: finished replicates equal what a
rerun would compute). ``--force`` lets a new calibration start in a folder
holding other files, and another ``--sims`` replace a finished
calibration.json; another calibration's checkpoint is never deleted.
"""

from __future__ import annotations

from workbench import commands as common

NAME = "calibrate"
HELP = "simulation-based calibration: does the model as coded tell its own story?"


def add_arguments(p) -> None:
    p.add_argument("target", metavar="RECIPE_OR_MODEL_FILE")
    p.add_argument("--data", required=True, help="CSV or Parquet table (its covariates shape each replicate)")
    p.add_argument("--sims", type=common.whole_number, required=True, metavar="N", help="replicates")
    p.add_argument("--workers", type=common.whole_number, default=None, help="local worker processes")
    p.add_argument("--cluster", default=None, metavar="ADDRESS", help="Dask scheduler address")
    common.add_design_arguments(p)
    common.add_run_arguments(p)
    p.add_argument("--history", metavar="PATH", default=None,
                   help="run history database (default reports/history.sqlite or $WORKBENCH_HISTORY)")
    # Per-replicate sampling: the runner's calibration settings unless given.
    p.set_defaults(draws=None, tune=None, chains=None)


def run(args) -> int:
    from workbench import api, plans
    from workbench.calibration import CALIBRATION_SETTINGS

    given = any(getattr(args, k) is not None for k in plans.COMMAND_LINE_SAMPLING)
    settings = plans.settings_from(args, base=CALIBRATION_SETTINGS) if given else None
    result = api.calibrate(
        args.target, args.data, sims=args.sims, options=dict(args.options),
        priors=common.priors(args.priors), seed=args.seed, workers=args.workers, cluster=args.cluster,
        out=args.out, force=args.force, settings=settings, recipe_folders=args.recipes,
        history=args.history or True, quiet=not common.show_progress(args), command=common.command_line(),
    )
    cal = result.doc["calibration"]
    print(f"{result.doc['design']}: implementation {result.verdict} "
          f"({cal['completed']} of {cal['sims']} replicates, {cal['failed']} failed)")
    for name, test in cal["parameters"].items():
        print(f"  {name:<24} uniformity p = {test['p_value']:.3g}")
    print(f"report: {result.files['report']}")
    return 0
