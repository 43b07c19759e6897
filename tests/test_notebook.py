"""The written notebook reruns its run through the Python API and reproduces its numbers."""

from __future__ import annotations

import json

import nbformat
import pytest

import shared_runs
from workbench.notebook import NUMBERS_TAG


def numbers_printed(nb) -> tuple[dict, str]:
    cell = next(c for c in nb.cells if NUMBERS_TAG in c.metadata.get("tags", []))
    text = "".join(o.get("text", "") for o in cell.outputs if o.output_type == "stream")
    body, _, verdict = text.partition("same numbers as the recorded run:")
    return json.loads(body), verdict.strip()


@pytest.fixture(scope="module")
def executed():
    """The healthy audit's notebook, executed in its run folder by a fresh kernel (no fit cache)."""
    from nbclient import NotebookClient

    code, folder = shared_runs.healthy_audit()
    nb = nbformat.read(folder / "notebook.ipynb", as_version=4)
    NotebookClient(nb, timeout=900, kernel_name="python3",
                   resources={"metadata": {"path": str(folder)}}).execute()
    return nb, folder


def test_notebook_rerun_reproduces_the_recorded_sampler_numbers_and_verdicts(executed):
    nb, folder = executed
    printed, verdict = numbers_printed(nb)
    recorded = json.loads((folder / "summary.json").read_text())
    check = printed["check"]
    expected = {k: v for k, v in recorded["computation"].items() if k != "seconds"}
    assert check["computation"] == expected
    assert check["loo"] == {k: recorded["loo"][k] for k in ("elpd", "se", "p_loo")}
    assert check["verdicts"] == {a["key"]: a["verdict"] for a in recorded["assumptions"]}
    assert verdict == "True"


def test_notebook_rerun_reproduces_every_gate_outcome(executed):
    nb, folder = executed
    printed, _ = numbers_printed(nb)
    audit = json.loads((folder / "audit.json").read_text())
    assert printed["passed"] is True
    assert printed["gates"] == {g["name"]: {"status": g["status"], "value": g["value"]} for g in audit["gates"]}


def test_notebook_shows_diagnostics_and_a_figure(executed):
    nb, _ = executed
    outputs = [o for c in nb.cells if c.cell_type == "code" for o in c.outputs]
    assert any("image/png" in o.get("data", {}) for o in outputs)
    assert any("r_hat" in o.get("data", {}).get("text/plain", "") for o in outputs)
    assert not any(o.output_type == "error" for o in outputs)


def test_comparison_notebook_is_valid_and_calls_the_public_api():
    code, folder = shared_runs.comparison()
    nb = nbformat.read(folder / "notebook.ipynb", as_version=4)
    nbformat.validate(nb)
    source = "\n".join(c.source for c in nb.cells)
    assert "workbench.compare(" in source and shared_runs.TRUE_DESIGN in source
    assert "cache=False" in source and "seed=2" in source


def test_a_plan_title_cannot_add_markup_or_headings_to_the_notebook():
    from workbench.notebook import for_audit

    title = "Sign-off <script>alert(1)</script>\n# injected [link](http://x) *bold*"
    doc = {"title": title, "data": {"path": "a`b.csv", "sha256": "0" * 64}, "seed": 1,
           "manifest": {"plan": {"file": "plan.toml"}}}
    intro = nbformat.reads(for_audit(doc), as_version=4).cells[0].source
    heading, _, rest = intro.partition("\n")
    assert heading == ("# Reproduce: Sign\\-off &lt;script&gt;alert\\(1\\)&lt;/script&gt; \\# injected "
                       "\\[link\\]\\(http://x\\) \\*bold\\*")
    assert "<script" not in intro and "\n#" not in rest
    assert "`` a`b.csv ``" in rest
