"""A Jupyter notebook that reproduces a run through the public Python API."""

from __future__ import annotations

import json
from pathlib import Path

import nbformat
from nbformat.v4 import new_code_cell, new_markdown_cell, new_notebook

from workbench.recipe import option_text


def for_check(run, summary: dict) -> str:
    """Notebook text: load the data, rebuild the design, refit with the same seed."""
    design = run.design
    target = design.recipe.source if getattr(design, "is_model_file", False) else design.name
    settings = run.settings
    cells = [
        new_markdown_cell(
            f"# Reproduce: {design.label()}\n\n"
            f"Data `{run.data_info.path}` (SHA-256 `{run.data_info.sha256}`), seed {run.seed}. "
            "Running every cell refits the design with the same seed and settings and "
            "compares the numbers with the run's `summary.json`."
        ),
        new_code_cell(
            "import json\nfrom pathlib import Path\n\nimport arviz as az\nimport workbench\n"
            "from workbench.engine import Settings"
        ),
        new_code_cell(
            f"result = workbench.check(\n"
            f"    {target!r},\n"
            f"    {str(Path(run.data_info.path).resolve())!r},\n"
            f"    options={json.dumps({k: option_text(v) for k, v in design.options.items()})},\n"
            f"    priors={json.dumps(dict(design.priors))},\n"
            f"    seed={run.seed},\n"
            f"    settings=Settings(draws={settings.draws}, tune={settings.tune}, "
            f"chains={settings.chains}, prior_draws={settings.prior_draws}),\n"
            f"    write=False,\n)\nresult"
        ),
        new_markdown_cell("## Sampler diagnostics"),
        new_code_cell("idata = result.run.fit.idata\naz.summary(idata, var_names="
                      f"{[rv.name for rv in run.fit.model.free_RVs]!r})"),
        new_code_cell("result.summary['computation']"),
        new_markdown_cell("## Posterior predictive check"),
        new_code_cell("az.plot_ppc_dist(idata)"),
        new_markdown_cell("## Compare with the recorded run"),
        new_code_cell(
            "recorded = json.loads(Path('summary.json').read_text()) if Path('summary.json').exists() else None\n"
            "if recorded:\n"
            "    for key in ('divergences', 'max_rhat', 'min_ess_bulk'):\n"
            "        print(key, recorded['computation'].get(key), result.summary['computation'].get(key))\n"
            "    print({a['key']: a['verdict'] for a in recorded['assumptions']})\n"
            "print(result.verdicts())"
        ),
    ]
    nb = new_notebook(cells=cells, metadata={"kernelspec": {"name": "python3", "display_name": "Python 3",
                                                            "language": "python"}})
    return nbformat.writes(nb)
