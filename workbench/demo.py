"""``workbench demo``: an invented scenario, simulated, written, checked.

Each recipe may offer a scenario (``Recipe.demo``): a story of our own with
documented true values, simulated by the recipe's own simulator. The table is
written where the user can open it, then checked like any other table.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np

from workbench import api, registry, writers
from workbench.errors import OptionError

# The demo's tables are simulated from this seed unless --seed says otherwise.
DEMO_SEED = 20261202


def run(recipe_name: str = "threshold-geometry", *, seed: int = 1, out=None, force=False,
        settings=None, recipe_folders=None, say=lambda _: None, progress=False):
    recipe = registry.load(recipe_folders).get(recipe_name)
    if recipe.demo is None:
        raise OptionError(f"recipe '{recipe_name}' has no demo scenario")
    scenario = recipe.demo(np.random.default_rng([DEMO_SEED, seed]))
    created = not (out and Path(out).exists())
    folder = writers.run_folder(str(out) if out else None, f"demo-{recipe_name}", force)
    with writers.kept_unless_empty(folder, created):
        data_path = Path(folder) / "demo-data.csv"
        writers.atomic_write(data_path, scenario.table.to_csv(index=False))
        writers.write_json(Path(folder) / "demo-truth.json",
                           {"title": scenario.title, "story": scenario.story,
                            "truth": scenario.truth, "options": scenario.options})
        say(f"{scenario.title}: {scenario.story}")
        say(f"true values: {scenario.truth}")
        return api.check(recipe_name, data_path, options=scenario.options, seed=seed, out=folder,
                         force=True, settings=settings, recipe_folders=recipe_folders, say=say,
                         progress=progress, truth=scenario.truth,
                         command=f"workbench check {recipe_name} --data {data_path} "
                                 + " ".join(f"--set {k}={v}" for k, v in scenario.options.items())
                                 + f" --seed {seed}")
