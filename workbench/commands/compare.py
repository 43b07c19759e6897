"""``workbench compare``: check several designs on one table and compare their predictions."""

from __future__ import annotations

from workbench import commands as common

NAME = "compare"
HELP = "compare candidate designs on one table (PSIS-LOO, stacking, verdicts side by side)"


def add_arguments(p) -> None:
    p.add_argument("designs", nargs="+", metavar="DESIGN",
                   help="RECIPE_OR_FILE[:KEY=VALUE]... (at least two), or one TOML plan listing them")
    p.add_argument("--data", help="CSV or Parquet table (required unless the plan names it)")
    p.add_argument("--workers", type=common.whole_number, default=None, help="processes for relaxed fits")
    p.add_argument("--no-relax", dest="relax", action="store_false", default=None,
                   help="skip the relaxation fits (verdicts rest on the predictive checks)")
    add_store_arguments(p)
    common.add_run_arguments(p)
    # None: take the plan's value, else the usual default.
    p.set_defaults(seed=None, draws=None, tune=None, chains=None)


def add_store_arguments(p) -> None:
    """--cache/--no-cache and --history, shared by the commands that fit and record."""
    p.add_argument("--cache", metavar="DIR", default=None,
                   help="fit cache folder (default reports/.fit-cache)")
    p.add_argument("--no-cache", dest="use_cache", action="store_false",
                   help="fit every design afresh and store nothing")
    p.add_argument("--history", metavar="PATH", default=None,
                   help="run history database (default reports/history.sqlite or $WORKBENCH_HISTORY)")


def cache_of(args):
    if not args.use_cache:
        return None
    return args.cache or True


def run(args) -> int:
    from workbench import plans
    from workbench.compare import compare

    is_plan = len(args.designs) == 1 and args.designs[0].endswith(".toml")
    plan = plans.read_plan(args.designs[0]) if is_plan else None
    result = compare(
        args.designs[0] if is_plan else args.designs, args.data, seed=args.seed, out=args.out,
        force=args.force, settings=plans.settings_from(args, plan),
        relax=args.relax, workers=args.workers, cache=cache_of(args), history=args.history or True,
        recipe_folders=args.recipes, say=common.say(args), progress=common.show_progress(args),
        command=common.command_line(),
    )
    for row in result.doc["comparison"]:
        gap = "" if row["place"] == 1 else f"  {row['gap']:.1f} below the best (SE {row['gap_se']:.1f})"
        print(f"  {row['place']}. {row['design']}  elpd {row['elpd']:.1f}{gap}  "
              f"stacking weight {row['stacking_weight']:.2f}")
    print(result.doc["statement"])
    print(f"report: {result.files['report']}")
    return 0
