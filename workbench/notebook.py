"""Jupyter notebooks that reproduce a run through the public Python API.

Every run folder gets a ``notebook.ipynb``: it repeats the run with the same
data, design, seed and sampling settings (computing only, writing nothing),
shows the key diagnostics and figures, and ends by printing the run's key
numbers next to the recorded JSON file's, so a reader sees at once whether
the rerun reproduced them.
"""

from __future__ import annotations

import html
import json
import os
import re
from pathlib import Path

import nbformat
from nbformat.v4 import new_code_cell, new_markdown_cell, new_notebook

from workbench.recipe import option_text

# Tag of the cell that prints the reproduced numbers (tests read its output).
NUMBERS_TAG = "reproduced-numbers"
IMPORTS = ("import json\nfrom pathlib import Path\n\nimport arviz as az\nimport workbench\n"
           "from workbench.engine import Settings\nfrom workbench.notebook import key_numbers")


def key_numbers(doc: dict) -> dict:
    """The numbers a rerun must reproduce, from any run document.

    Sampler diagnostics, LOO and verdicts of a check (``workbench.summary/1``);
    the LOO table of a comparison; gate outcomes of an audit; the uniformity
    p-values of a calibration. Run times are left out: they differ.
    """
    schema = doc.get("schema", "")
    if schema.startswith("workbench.compare/"):
        return {"best": doc["best"],
                "comparison": [{k: r[k] for k in ("design", "elpd", "elpd_se", "gap", "gap_se", "stacking_weight")}
                               for r in doc["comparison"]],
                "designs": {d["label"]: key_numbers(d["summary"]) for d in doc["designs"]}}
    if schema.startswith("workbench.audit/"):
        return {"passed": doc["passed"],
                "gates": {g["name"]: {"status": g["status"], "value": g["value"]} for g in doc["gates"]},
                "check": key_numbers(doc["summary"])}
    if schema.startswith("workbench.calibration-run/"):
        cal = doc["calibration"]
        return {"completed": cal["completed"],
                "p_values": {k: v["p_value"] for k, v in cal["parameters"].items()}}
    out = {"computation": {k: v for k, v in (doc.get("computation") or {}).items() if k != "seconds"},
           "verdicts": {a["key"]: a["verdict"] for a in doc.get("assumptions", [])}}
    if doc.get("loo"):
        out["loo"] = {k: doc["loo"][k] for k in ("elpd", "se", "p_loo")}
    if doc.get("calibration"):
        out["calibration"] = {k: v["p_value"] for k, v in doc["calibration"]["parameters"].items()}
    return out


def _settings(sampling: dict) -> str:
    """The ``Settings(...)`` call that rebuilds recorded sampling settings (defaults where unrecorded)."""
    from workbench.engine import Settings

    given = {k: sampling[k] for k in Settings().to_dict() if k in sampling}
    return "Settings(" + ", ".join(f"{k}={v!r}" for k, v in given.items()) + ")"


def _compare_cell(recorded: str) -> nbformat.NotebookNode:
    cell = new_code_cell(
        "reproduced = key_numbers(result.to_dict())\n"
        "print(json.dumps(reproduced, indent=1, sort_keys=True))\n"
        f"recorded_file = Path({recorded!r})\n"
        "if recorded_file.exists():\n"
        "    recorded = key_numbers(json.loads(recorded_file.read_text()))\n"
        "    print('same numbers as the recorded run:', recorded == reproduced)"
    )
    cell.metadata["tags"] = [NUMBERS_TAG]
    return cell


def _notebook(cells: list) -> str:
    nb = new_notebook(cells=cells, metadata={"kernelspec": {"name": "python3", "display_name": "Python 3",
                                                            "language": "python"}})
    return nbformat.writes(nb)


# Characters that start Markdown syntax (emphasis, links, headings, lists, tables);
# HTML's <, > and & become entities instead.
MARKDOWN_SPECIAL = set("\\`*_{}[]()#+-.!|~")


def markdown_text(text: str) -> str:
    """``text`` as plain words in Markdown: one line, every syntax character escaped."""
    escaped = "".join(f"\\{c}" if c in MARKDOWN_SPECIAL else c for c in " ".join(str(text).split()))
    return html.escape(escaped, quote=False)


def markdown_code(text: str) -> str:
    """``text`` as a one-line code span, fenced by more backticks than it holds."""
    text = " ".join(str(text).split())
    ticks = "`" * (max((len(run) for run in re.findall(r"`+", text)), default=0) + 1)
    return f"{ticks} {text} {ticks}" if "`" in text else f"`{text}`"


def _intro(title: str, doc: dict, what: str) -> nbformat.NotebookNode:
    data = doc["data"]
    return new_markdown_cell(
        f"# Reproduce: {markdown_text(title)}\n\n"
        f"Data {markdown_code(data['path'])} (SHA-256 `{data['sha256']}`), seed {doc['seed']}. "
        f"Running every cell {what} with the same seed and settings, writing nothing, and "
        "compares the key numbers with the recorded run's file in this folder."
    )


def relative_to(folder, path) -> str:
    """``path`` as seen from ``folder`` (the run folder the notebook opens in).

    A reviewer who copies the run folder together with the table, or opens
    the repository elsewhere, keeps a notebook that finds its data; an
    absolute path would name one machine's disk.
    """
    if folder is None:
        return str(Path(path).resolve())
    try:
        return os.path.relpath(Path(path).resolve(), Path(folder).resolve())
    except ValueError:  # another drive: no relative path exists
        return str(Path(path).resolve())


def _data_check_cell(path: str, sha256: str):
    """A cell that stops when the table is not the one the run read."""
    return new_code_cell(
        "import hashlib\n\n"
        f"DATA = {path!r}\n"
        f"assert hashlib.sha256(Path(DATA).read_bytes()).hexdigest() == {sha256!r}, "
        "'the table differs from the one this run read'")


def for_check(run, summary: dict, folder=None) -> str:
    """Notebook text: load the data, rebuild the design, refit with the same seed.

    Paths (the table, a model file) are written relative to ``folder``.
    """
    design = run.design
    target = (relative_to(folder, design.recipe.source) if getattr(design, "is_model_file", False)
              else design.name)
    settings = run.settings
    plan = (summary.get("manifest") or {}).get("plan") or {}
    sbc = int(plan.get("sbc") or 0)
    relax = bool(plan.get("relax", True))
    free = [rv.name for rv in run.fit.model.free_RVs] if run.fit.model is not None else None
    cells = [
        _intro(design.label(), summary, "refits the design"),
        new_code_cell(IMPORTS),
        _data_check_cell(relative_to(folder, run.data_info.path), run.data_info.sha256),
        new_code_cell(
            f"result = workbench.check(\n"
            f"    {target!r},\n"
            f"    DATA,\n"
            f"    options={json.dumps({k: option_text(v) for k, v in design.options.items()})},\n"
            f"    priors={json.dumps(dict(design.priors))},\n"
            f"    seed={run.seed},\n"
            f"    settings={_settings(settings.to_dict())},\n"
            f"    relax={relax},\n"
            + (f"    sbc={sbc},\n" if sbc else "")
            + "    write=False,\n)\nresult"
        ),
        new_markdown_cell("## Sampler diagnostics"),
        new_code_cell("idata = result.run.fit.idata\n"
                      + (f"az.summary(idata, var_names={free!r})" if free else "az.summary(idata)")),
        new_code_cell("result.summary['computation']"),
        new_markdown_cell("## Posterior predictive check"),
        new_code_cell("az.plot_ppc_dist(idata);"),
        new_markdown_cell("## The numbers, reproduced and recorded"),
        _compare_cell("summary.json"),
    ]
    return _notebook(cells)


def for_compare(doc: dict) -> str:
    """Notebook text of a comparison: rerun ``workbench.compare`` without the fit cache."""
    designs = [d["target"] + "".join(f":{k}={v}" for k, v in d["options"].items())
               + "".join(f":{k}~{v}" for k, v in d["priors"].items()) for d in doc["designs"]]
    cells = [
        _intro(doc["title"], doc, "checks every design again"),
        new_code_cell(IMPORTS),
        new_code_cell(
            "result = workbench.compare(\n"
            f"    {json.dumps(designs)},\n"
            f"    {str(Path(doc['data']['path']).resolve())!r},\n"
            f"    seed={doc['seed']},\n"
            f"    settings={_settings(doc['sampling'])},\n"
            f"    relax={bool(doc['relax'])},\n"
            "    cache=False,\n    write=False,\n)\nresult"
        ),
        new_markdown_cell("## The comparison table and where each design wins"),
        new_code_cell("result.table()"),
        new_code_cell("from workbench.compare import pointwise_figure\n\npointwise_figure(result.to_dict())"),
        new_markdown_cell("## Sampler diagnostics of each design"),
        new_code_cell("{c.run.design.label(): c.summary['computation'] for c in result.checks}"),
        new_markdown_cell("## The numbers, reproduced and recorded"),
        _compare_cell("compare.json"),
    ]
    return _notebook(cells)


def for_audit(doc: dict) -> str:
    """Notebook text of an audit: rerun ``workbench.audit`` on its plan without the fit cache."""
    plan = doc["manifest"]["plan"]
    cells = [
        _intro(doc["title"], doc, "audits the plan again"),
        new_code_cell(IMPORTS),
        new_code_cell(
            "result = workbench.audit(\n"
            f"    {str(Path(plan['file']).resolve())!r},\n"
            "    cache=False,\n    write=False,\n)\nresult"
        ),
        new_markdown_cell("## Gates"),
        new_code_cell("result.gates()"),
        new_markdown_cell("## Sampler diagnostics"),
        new_code_cell("idata = result.check.run.fit.idata\naz.summary(idata)"),
        new_code_cell("az.plot_ppc_dist(idata);"),
        new_markdown_cell("## The numbers, reproduced and recorded"),
        _compare_cell("audit.json"),
    ]
    return _notebook(cells)


def for_calibration(doc: dict) -> str:
    """Notebook text of a calibration: rerun ``workbench.calibrate`` in a scratch folder."""
    spec = doc["manifest"]["plan"]
    cells = [
        _intro(doc["design"], doc, "reruns the calibration"),
        new_code_cell(IMPORTS + "\nimport tempfile"),
        new_code_cell(
            "result = workbench.calibrate(\n"
            f"    {spec['target']!r},\n"
            f"    {str(Path(doc['data']['path']).resolve())!r},\n"
            f"    sims={doc['calibration']['sims']},\n"
            f"    options={json.dumps(spec['options'])},\n"
            f"    priors={json.dumps(spec['priors'])},\n"
            f"    seed={doc['seed']},\n"
            + (f"    settings={_settings(spec['sampling'])},\n" if spec.get("sampling") else "")
            + "    write=False,\n)\nresult"
        ),
        new_markdown_cell("## Rank uniformity"),
        new_code_cell("from workbench.report import calibration_plots\n\n"
                      "calibration_plots.ecdf_difference_figure(result.calibration)"),
        new_markdown_cell("## The numbers, reproduced and recorded"),
        _compare_cell("calibration.json"),
    ]
    return _notebook(cells)
