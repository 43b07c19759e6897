"""Detection and false-alarm rates of the diagnosis, per recipe, on random layouts.

For every recipe with a demo scenario: per seed, draw a layout at random
within documented ranges (benchmarks/layouts.py: rows or cohorts, covariate
range and spacing, units, inspection schedule, fault strength), simulate data
that satisfy every assumption and data that violate exactly one assumption,
and run the full check on each. For every planted fault it also measures the
power an ideal test would have on that layout (benchmarks/ideal_power.py: a
likelihood-ratio test of the true generating model against its null at the
0.5% level, by simulation, with maximum-likelihood fits). It prints, per
recipe and fault: runs, the share of runs that mark the right assumption
broken among layouts where the ideal power is at least 0.9 (target >= 0.9),
the share that mark any other assumption broken over all layouts (target <=
0.02), and for clean data the share with any broken verdict (target <= 0.02)
and the largest share of doubtful verdicts of one assumption (target <=
0.15).

    .venv/bin/python benchmarks/diagnosis_rates.py --seeds 5 --store reports/rates
    .venv/bin/python benchmarks/diagnosis_rates.py --rejudge reports/rates
    .venv/bin/python benchmarks/diagnosis_rates.py --layout demo --seeds 20

Every run is kept in ``--store`` (its layout, planted values, findings and
verdicts), so ``--rejudge`` prints the table again from the stored findings
with the verdict rules as they are now, without refitting, and ``--power``
adds the ideal power of stored runs that lack it. ``--layout demo`` measures
each recipe on its demo layout at the strength each relaxation declares as
``planted`` (the earlier table of the README).
"""

from __future__ import annotations

import argparse
import json
import pickle
import sys
import time
import warnings
from pathlib import Path

import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parent))

import ideal_power  # noqa: E402
import layouts  # noqa: E402

from workbench import engine, harness, rates, registry, verdicts  # noqa: E402
from workbench.recipe import make_design  # noqa: E402

DETECTION_TARGET = 0.9
OTHER_BROKEN_TARGET = 0.02
CLEAN_BROKEN_TARGET = 0.02
CLEAN_DOUBTFUL_TARGET = 0.15
# A layout counts as one where the fault can be seen when an ideal test finds it this often.
DETECTABLE_POWER = 0.9
CLEAN = rates.CLEAN

# Recipes and their layout variants (stage-transitions reads two layouts).
# A variant's place in this list seeds its layouts: new variants go last, so that
# the layouts of a seed already measured stay the same.
VARIANTS = [("threshold-geometry", ""), ("timing-curve", ""), ("competing-risks", ""),
            ("stage-transitions", "stage counts"), ("stage-transitions", "transition counts"),
            ("timing-curve", layouts.DOSE)]
# The faults planted on a variant whose layout differs in kind (one row per
# unit, a covariate): its own assumption and the timing faults a unit layout
# can show (it has no counts to overdisperse).
VARIANT_FAULTS = {("timing-curve", layouts.DOSE): ("covariate_form", "covariate_form:shape", "curve_shape",
                                                   "cohort_homogeneity")}
# Design options a variant's layouts always carry (which assumptions it makes).
VARIANT_OPTIONS = {("timing-curve", layouts.DOSE): {"covariates": "dose"}}


def faults(recipe, variant: str = "") -> list[tuple[str, str]]:
    """(scenario, assumption it breaks): clean, one per relaxation, and the recipe's extra faults."""
    out = [(CLEAN, "")]
    only = VARIANT_FAULTS.get((recipe.name, variant))
    options = VARIANT_OPTIONS.get((recipe.name, variant), {})
    for scenario in rates.scenarios(recipe, options):
        if scenario != CLEAN and (only is None or scenario in only):
            out.append((scenario, scenario))
    made = {a.key for a in recipe.assumptions if a.made_under(options)}
    for recipe_name, scenario in layouts.STRENGTHS:
        key = scenario.split(":")[0]
        if recipe_name == recipe.name and ":" in scenario and key in made and (only is None or scenario in only):
            out.append((scenario, key))
    return out


def planted_for(recipe, scenario: str, rng, variant: str = "") -> tuple[dict, dict]:
    """(parameter values, design options) that plant ``scenario`` on a random layout."""
    if scenario == CLEAN:
        return {}, {}
    parameter, value = layouts.fault_strength(recipe.name, scenario, rng)
    options = {}
    if ":" not in scenario:
        options = dict(rates.scenarios(recipe, VARIANT_OPTIONS.get((recipe.name, variant), {}))[scenario].options)
    return {parameter: value}, options


def simulate(design, base, truth: dict, planted: dict, rng):
    """The table's outcomes under the truth and the planted fault.

    ``eventual_drift`` (timing-curve) is planted by thinning: every unit is
    followed as if all have the event, then each cohort keeps each event
    with its own eventual share, whose log-odds drift linearly over the
    cohorts' order (exact: a unit's timing is independent of whether it
    ever has the event).
    """
    if "eventual_drift" not in planted:
        return design.simulate(rng, base, {**truth, **planted})
    shares = eventual_shares(base, truth["eventual"], planted["eventual_drift"])
    sim = design.simulate(rng, base, {**truth, "eventual": 1.0})
    cum = np.asarray(sim["events"], dtype=np.int64)
    prev = base["prev_row"]
    inc = cum - np.where(prev >= 0, cum[np.maximum(prev, 0)], 0)
    kept = rng.binomial(inc, shares[base["cohort"]])
    out = np.zeros_like(kept)
    for row in range(base.rows):
        out[row] = kept[row] + (out[prev[row]] if prev[row] >= 0 else 0)
    return sim.replace(events=out)


def eventual_shares(base, eventual: float, drift: float) -> np.ndarray:
    """Each cohort's eventual share: log-odds of ``eventual`` +- drift / 2 from first to last cohort."""
    from scipy.special import expit, logit

    n = len(base.labels["cohort"])
    position = np.linspace(-0.5, 0.5, n) if n > 1 else np.zeros(1)
    return expit(logit(eventual) + drift * position)


def prepare(reg, name: str, variant: str, scenario: str, seed: int):
    """The layout, planted fault, design and simulated table of one run (the same for every use)."""
    recipe = reg.get(name)
    rng = np.random.default_rng([seed, VARIANTS.index((name, variant)), len(scenario), sum(map(ord, scenario))])
    layout = layouts.draw(name, rng, variant)
    planted, options = planted_for(recipe, scenario, rng, variant)
    design = make_design(recipe, {**layout.options, **options}, {})
    base = design.validate(layout.table)
    data = simulate(design, base, layout.truth, planted, rng)
    return layout, planted, options, design, base, data


def slug_of(name, variant, scenario, seed) -> str:
    slug = f"{name}-{variant or 'default'}-{scenario}-{seed:03d}".replace(" ", "_")
    return slug.replace("(", "").replace(")", "").replace(":", "_")


def power_of(reg, name, variant, scenario, seed, sims) -> float:
    layout, planted, _, design, base, _ = prepare(reg, name, variant, scenario, seed)
    return ideal_power.power(design, base, layout.truth, planted, scenario, sims,
                             np.random.default_rng([seed, 7]), simulate)


def run_one(reg, name: str, variant: str, scenario: str, target: str, seed: int, settings,
            power_sims: int, say) -> dict:
    layout, planted, options, design, base, data = prepare(reg, name, variant, scenario, seed)
    truth = layout.truth
    info = harness.DataInfo(f"simulated:{name}:{scenario}:{seed}", "", data.rows)
    record = {"recipe": name, "variant": variant, "scenario": scenario, "target": target, "seed": seed,
              "layout": layout.describe, "planted": planted, "options": {**layout.options, **options},
              "table": layout.table, "truth": truth}
    start = time.perf_counter()
    try:
        run = harness.run_check(design, data, info, seed=seed, settings=settings, workers=1)
    except Exception as err:  # a failed fit is a result to count, not a reason to stop
        record["failure"] = f"{type(err).__name__}: {err}"
        return record
    record["seconds"] = time.perf_counter() - start
    record["declared"] = [(a.key, a.statement, a.advice_for(design.options)) for a in design.assumptions]
    record["uninformed"] = {a.key: a.uninformed(data) for a in design.assumptions if a.uninformed(data)}
    record["findings"] = [f for f in run.findings]
    record["verdicts"] = {v.key: v.verdict for v in run.verdicts}
    if power_sims and scenario != CLEAN:
        record["power"] = ideal_power.power(design, base, truth, planted, scenario, power_sims,
                                            np.random.default_rng([seed, 7]), simulate)
    say(f"{name} {variant} {scenario} seed {seed}: "
        + ", ".join(f"{k}={v}" for k, v in record["verdicts"].items() if v != "holds")
        + (f" (ideal power {record['power']:.2f})" if "power" in record else ""))
    return record


def rejudge(record: dict) -> dict:
    """Verdicts from the stored findings with the rules as they are now.

    A relaxation finding stored before it carried ``absorbs_misfit`` gets the
    flag from the recipe's relaxation as declared now (a fixed property of
    the design, not of the fit).
    """
    recipe = registry.load().get(record["recipe"])
    flags = {a.relaxation.parameter: a.relaxation.absorbs_misfit for a in recipe.assumptions
             if a.relaxation is not None}
    for f in record["findings"]:
        if f.kind == "relaxation" and "absorbs_misfit" not in f.numbers:
            f.numbers["absorbs_misfit"] = flags.get(f.numbers["parameter"], False)
    # Advice that depends on the design was once stored as its function.
    declared = [(key, statement, advice(record["options"]) if callable(advice) else advice)
                for key, statement, advice in record["declared"]]
    judged = verdicts.decide(declared, record["findings"], record["uninformed"])
    return {v.key: v.verdict for v in judged}


def table(records: list[dict], fresh: bool) -> list[dict]:
    rows = []
    groups: dict[tuple, list[dict]] = {}
    for r in records:
        groups.setdefault((r["recipe"], r["variant"], r["scenario"]), []).append(r)
    order = {(n, v): i for i, (n, v) in enumerate(VARIANTS)}
    for (name, variant, scenario), group in sorted(groups.items(), key=lambda kv: (order[kv[0][:2]], kv[0][2] != CLEAN, kv[0][2])):
        done = [r for r in group if "findings" in r]
        judged = [(r, rejudge(r) if fresh else r["verdicts"]) for r in done]
        target = group[0]["target"]
        row = {"recipe": name, "variant": variant, "scenario": scenario, "runs": len(done),
               "failures": len(group) - len(done)}
        if scenario == CLEAN:
            row["any_broken"] = _share([any(v == "broken" for v in j.values()) for _, j in judged])
            keys = sorted({k for _, j in judged for k in j})
            doubt = {k: _share([j.get(k) == "doubtful" for _, j in judged]) for k in keys}
            row["doubtful"] = {k: v for k, v in doubt.items() if v}
        else:
            detectable = [(r, j) for r, j in judged if r.get("power", 0.0) >= DETECTABLE_POWER]
            row["detectable"] = len(detectable)
            row["right_broken"] = _share([j.get(target) == "broken" for _, j in detectable])
            row["right_broken_all"] = _share([j.get(target) == "broken" for _, j in judged])
            row["other_broken"] = _share([any(v == "broken" for k, v in j.items() if k != target)
                                          for _, j in judged])
            row["misses"] = [{"seed": r["seed"], "power": r.get("power"), "verdicts":
                              {k: v for k, v in j.items() if v != "holds"}, "layout": r["layout"],
                              "planted": r["planted"]}
                             for r, j in judged if (j.get(target) != "broken" and r.get("power", 0) >= DETECTABLE_POWER)
                             or any(v == "broken" for k, v in j.items() if k != target)]
        rows.append(row)
    return rows


def _share(flags) -> float | None:
    flags = list(flags)
    return sum(flags) / len(flags) if flags else None


def _f(x) -> str:
    return "-" if x is None else f"{x:.2f}"


def show(rows: list[dict]) -> None:
    print(f"{'recipe':<34} {'planted fault':<34} {'runs':>4} {'detectable':>10} {'right broken':>12} "
          f"{'other broken':>12}  clean: any broken, doubtful > 0")
    for row in rows:
        label = row["recipe"] + (f" ({row['variant']})" if row["variant"] else "")
        if row["scenario"] == CLEAN:
            worst = max(row["doubtful"].values(), default=0.0)
            ok = (row["any_broken"] or 0) <= CLEAN_BROKEN_TARGET and worst <= CLEAN_DOUBTFUL_TARGET
            doubt = ", ".join(f"{k} {v:.2f}" for k, v in row["doubtful"].items()) or "none"
            print(f"{label:<34} {'none (clean)':<34} {row['runs']:>4} {'':>10} {'':>12} {'':>12}  "
                  f"{_f(row['any_broken'])}; {doubt}  {'met' if ok else 'MISSED'}")
            continue
        ok = (row["right_broken"] is None or row["right_broken"] >= DETECTION_TARGET) and \
            (row["other_broken"] or 0) <= OTHER_BROKEN_TARGET
        print(f"{label:<34} {row['scenario']:<34} {row['runs']:>4} {row['detectable']:>10} "
              f"{_f(row['right_broken']):>12} {_f(row['other_broken']):>12}  {'met' if ok else 'MISSED'}"
              + (f" ({row['failures']} failed)" if row["failures"] else ""))


def load(folder: Path) -> list[dict]:
    out = []
    for path in sorted(folder.glob("*.pkl")):
        with open(path, "rb") as handle:
            out.append(pickle.load(handle))
    return out


def demo_mode(args, reg) -> int:
    """The rates on each recipe's demo layout (the earlier measurement)."""
    names = args.recipe or sorted(n for n, r in reg.recipes.items() if r.demo is not None)
    settings = engine.Settings(draws=args.draws, tune=args.tune)
    seeds = range(args.first_seed, args.first_seed + args.seeds)
    say = (lambda m: print(m, file=sys.stderr, flush=True)) if args.verbose else (lambda _: None)
    print(f"{'recipe':<20} {'planted fault':<22} {'runs':>4} {'right broken':>12} {'other broken':>12}")
    for name in names:
        recipe = reg.get(name)
        for scenario, planted in rates.scenarios(recipe).items():
            if args.scenario and scenario not in args.scenario:
                continue
            tally = rates.run_scenario(recipe, scenario, planted, seeds, settings, say)
            row = tally.row()
            print(f"{name:<20} {scenario:<22} {tally.runs:>4} {_f(row['detected']):>12} "
                  f"{_f(row['other_broken']):>12}", flush=True)
    return 0


def main() -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--layout", choices=("random", "demo"), default="random")
    parser.add_argument("--recipe", action="append", help="recipe name (repeatable; default: all)")
    parser.add_argument("--variant", action="append", help="stage-transitions layout: 'stage counts' or "
                                                           "'transition counts' (repeatable)")
    parser.add_argument("--scenario", action="append",
                        help="only this scenario: '(clean)' or a fault name (repeatable)")
    parser.add_argument("--seeds", type=int, default=5)
    parser.add_argument("--first-seed", type=int, default=1)
    parser.add_argument("--draws", type=int, default=1000)
    parser.add_argument("--tune", type=int, default=1000)
    parser.add_argument("--power-sims", type=int, default=100,
                        help="replicates per layout for the ideal test's power (0: skip)")
    parser.add_argument("--store", help="keep every run here (one file per run)")
    parser.add_argument("--rejudge", help="print the table from the runs stored in this folder")
    parser.add_argument("--power", action="store_true", help="with --rejudge: add missing ideal powers")
    parser.add_argument("--power-only", action="store_true",
                        help="compute the ideal powers of the runs' layouts into --store (no checks)")
    parser.add_argument("--json", help="also write the table as JSON here")
    parser.add_argument("--verbose", action="store_true")
    args = parser.parse_args()
    warnings.simplefilter("ignore")
    reg = registry.load()
    if args.layout == "demo":
        return demo_mode(args, reg)
    say = (lambda m: print(m, file=sys.stderr, flush=True)) if args.verbose else (lambda _: None)
    if args.rejudge:
        folder = Path(args.rejudge)
        records = load(folder)
        for r in records:
            stored = folder / f"{slug_of(r['recipe'], r['variant'], r['scenario'], r['seed'])}.power"
            if "power" not in r and stored.exists():
                r["power"] = float(stored.read_text())
        if args.power:
            for path, r in zip(sorted(folder.glob("*.pkl")), records):
                if r["scenario"] != CLEAN and "power" not in r and "findings" in r:
                    recipe = reg.get(r["recipe"])
                    design = make_design(recipe, r["options"], {})
                    base = design.validate(r["table"])
                    r["power"] = ideal_power.power(design, base, r["truth"], r["planted"], r["scenario"],
                                                   args.power_sims, np.random.default_rng([r["seed"], 7]),
                                                   simulate)
                    say(f"{r['recipe']} {r['variant']} {r['scenario']} seed {r['seed']}: power {r['power']:.2f}")
                    with open(path, "wb") as handle:
                        pickle.dump(r, handle)
        rows = table(records, fresh=True)
    else:
        settings = engine.Settings(draws=args.draws, tune=args.tune)
        store = Path(args.store) if args.store else None
        if store:
            store.mkdir(parents=True, exist_ok=True)
        records = []
        for seed in range(args.first_seed, args.first_seed + args.seeds):
            for name, variant in VARIANTS:
                if args.recipe and name not in args.recipe or args.variant and variant not in args.variant:
                    continue
                for scenario, target in faults(reg.get(name), variant):
                    if args.scenario and scenario not in args.scenario:
                        continue
                    slug = slug_of(name, variant, scenario, seed)
                    if args.power_only:
                        if scenario != CLEAN and not (store / f"{slug}.power").exists():
                            value = power_of(reg, name, variant, scenario, seed, args.power_sims)
                            (store / f"{slug}.power").write_text(f"{value}\n")
                            say(f"{slug}: ideal power {value:.2f}")
                        continue
                    if store and (store / f"{slug}.pkl").exists():
                        with open(store / f"{slug}.pkl", "rb") as handle:
                            records.append(pickle.load(handle))
                        continue
                    record = run_one(reg, name, variant, scenario, target, seed, settings, args.power_sims, say)
                    records.append(record)
                    if store:
                        with open(store / f"{slug}.pkl", "wb") as handle:
                            pickle.dump(record, handle)
        if args.power_only:
            return 0
        rows = table(records, fresh=False)
    show(rows)
    if args.json:
        with open(args.json, "w") as handle:
            json.dump(rows, handle, indent=2, default=str)
    return 0


if __name__ == "__main__":
    sys.exit(main())
