"""``workbench recipes``: list recipes with columns, options, parameters, assumptions."""

from __future__ import annotations

import sys
import textwrap

NAME = "recipes"
HELP = "list recipes with their columns, options, parameters and assumptions"


def add_arguments(p) -> None:
    p.add_argument("--recipes", action="append", default=[], metavar="DIR",
                   help="extra recipe folder (repeatable; also $WORKBENCH_RECIPES)")


def run(args) -> int:
    from workbench import registry
    from workbench.recipe import REQUIRED

    reg = registry.load(args.recipes)
    for name in sorted(reg.recipes):
        r = reg.recipes[name]
        print(f"{name}  ({r.source})")
        print(textwrap.indent(textwrap.fill(r.summary, 76), "    "))
        cols = ", ".join(c.name + ("" if c.required else " (optional)") for c in r.columns)
        print(f"    columns:     {cols}")
        for o in r.options:
            default = "" if o.default is REQUIRED else f" [default {o.default}]"
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
        print(f"workbench: could not load recipe file {problem}", file=sys.stderr)
    return 0
