"""``workbench demo``: simulate an invented scenario, check it, print the verdicts."""

from __future__ import annotations

from workbench import commands as common

NAME = "demo"
HELP = "simulate an invented scenario, check it and print the verdicts"


def add_arguments(p) -> None:
    p.add_argument("--recipe", default="threshold-geometry", help="which recipe's scenario")
    common.add_run_arguments(p)


def run(args) -> int:
    from workbench import demo, plans

    result = demo.run(args.recipe, seed=args.seed, out=args.out, force=args.force,
                      settings=plans.settings_from(args), recipe_folders=args.recipes,
                      say=common.say(args), progress=common.show_progress(args))
    common.print_verdicts(result.summary)
    print(f"data:   {result.run.data_info.path}")
    print(f"report: {result.files['report']}")
    return 0
