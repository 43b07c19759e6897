"""``workbench check``: the full check of a design on a table.

The target may be a TOML plan file instead of a recipe: the plan then gives
the data, recipe or model file, seed, sbc, options, priors and sampling;
``--set``/``--prior`` add to or override its options and priors, and
``--data``, ``--seed``, ``--sbc``, ``--draws``, ``--tune`` and ``--chains``
override its values when given.
"""

from __future__ import annotations

from workbench import commands as common

NAME = "check"
HELP = "run the full check of a design (or a TOML plan) on a table"


def add_arguments(p) -> None:
    p.add_argument("target", metavar="RECIPE_OR_MODEL_FILE_OR_PLAN")
    p.add_argument("--data", help="CSV or Parquet table (required unless a plan names it)")
    common.add_design_arguments(p)
    p.add_argument("--sbc", type=common.whole_number, default=None, metavar="N",
                   help="simulation-based calibration replicates (default 0: none)")
    p.add_argument("--workers", type=common.whole_number, default=None, help="local worker processes")
    p.add_argument("--cluster", default=None, metavar="ADDRESS", help="Dask scheduler address")
    p.add_argument("--no-relax", dest="relax", action="store_false", default=None,
                   help="skip the relaxation fits")
    common.add_run_arguments(p)
    p.add_argument("--history", metavar="PATH", default=None,
                   help="run history database (default reports/history.sqlite or $WORKBENCH_HISTORY)")
    # None: the plan's value when a plan is given, else the usual default.
    p.set_defaults(seed=None, draws=None, tune=None, chains=None)


def run(args) -> int:
    from workbench import api, plans
    from workbench.errors import OptionError

    plan = plans.read_plan(args.target) if args.target.endswith(".toml") else None
    if plan is not None:
        spec = plan.design
        target, data = spec.target, args.data or plan.data
        options = {**spec.options, **dict(args.options)}
        priors = {**spec.priors, **common.priors(args.priors)}
        seed = plan.seed if args.seed is None else args.seed
        sbc = plan.sbc if args.sbc is None else args.sbc
        relax = plan.relax if args.relax is None else args.relax
    else:
        target, data = args.target, args.data
        options, priors = dict(args.options), common.priors(args.priors)
        seed = 1 if args.seed is None else args.seed
        sbc = args.sbc or 0
        relax = True if args.relax is None else args.relax
    if data is None:
        raise OptionError("check: the following arguments are required: --data")
    result = api.check(
        target, data, options=options, priors=priors, seed=seed, out=args.out, force=args.force,
        sbc=sbc, workers=args.workers, cluster=args.cluster,
        settings=plans.settings_from(args, plan), relax=relax,
        recipe_folders=args.recipes, say=common.say(args), progress=common.show_progress(args),
        command=common.command_line(), history=args.history or True,
        plan_file=plan.path if plan else None,
    )
    common.print_verdicts(result.summary)
    print(f"report: {result.files['report']}")
    return 0
