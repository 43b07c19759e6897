"""Hostile and odd text in the input: escaped in HTML, kept exactly in JSON and NetCDF.

User text reaches the outputs through group labels, cohort labels, outcome
column names, option values (``--set``), the data file's name and the
command line. Each test run below plants the same hostile strings in those
places: markup that would run script, quotes and ampersands, Unicode beyond
Latin-1, template syntax, matplotlib's mathtext dollars and a very long word.
"""

from __future__ import annotations

import ast
import json
from html.parser import HTMLParser
from pathlib import Path

import nbformat
import numpy as np
import pandas as pd
import pytest
import xarray as xr

from workbench.cli import main

# The browser fixtures and marks of the report's browser tests.
from test_browser import NEEDS_CHROMIUM, PHONE, browser, visit  # noqa: F401

HOSTILE = {
    "script": '<script>alert("owned")</script>',
    "markup": "</td></table><img src=x onerror=alert(1)>",
    "quotes": "say \"hi\" & 'bye' &amp;",
    "unicode": "Zürich ✓ 東京 🌲 naïve",
    "template": "{{ 7*7 }}{% raw %}",
    # Text between two dollars is matplotlib mathtext; an unknown command there breaks its parser.
    "math": r"$\alpha$ team $\unknowncommand$",
    "long": "seedling-" * 400,
}
# Outcome names are column names and parts of a comma-separated option value,
# so they cannot contain a comma; none of these does.
OUTCOME_NAMES = (HOSTILE["script"], HOSTILE["quotes"])
SMALL_RUN = ["--draws", "100", "--tune", "100", "--chains", "2", "--no-relax", "--quiet", "--seed", "2"]
# Group labels of the competing-risks run: they title the panels of its figure.
FIGURE_GROUPS = (HOSTILE["math"], HOSTILE["long"])


class _Page(HTMLParser):
    """Every tag, attribute and text node of a page (text with entities decoded)."""

    def __init__(self, text: str):
        super().__init__(convert_charrefs=True)
        self.tags: list[tuple[str, dict]] = []
        self.text: list[str] = []
        self.feed(text)

    def handle_starttag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))

    def handle_data(self, data):
        self.text.append(data)


def assert_safe_page(page_text: str, shown: list[str]) -> None:
    """No active content from the input; every string in ``shown`` appears as plain text."""
    page = _Page(page_text)
    names = {tag for tag, _ in page.tags}
    assert not names & {"script", "iframe", "object", "embed", "form"}
    for tag, attrs in page.tags:
        assert not [a for a in attrs if a.startswith("on")], (tag, attrs)
        if tag == "img":
            assert attrs["src"].startswith("data:image/")
    assert HOSTILE["script"] not in page_text and HOSTILE["markup"] not in page_text
    text = "".join(page.text)
    for s in shown:
        assert s in text, f"{s[:40]!r} missing from the page text"
    assert page_text.rstrip().endswith("</html>")


def notebook_options(path: Path) -> dict:
    """The ``options=`` literal of the notebook's check call, evaluated as Python."""
    nb = nbformat.reads(path.read_text(encoding="utf-8"), as_version=4)
    nbformat.validate(nb)
    for cell in nb.cells:
        if cell.cell_type != "code":
            continue
        tree = ast.parse(cell.source)  # every code cell must be valid Python
        for node in ast.walk(tree):
            if isinstance(node, ast.keyword) and node.arg == "options":
                return ast.literal_eval(node.value)
    raise AssertionError("no options= in the notebook")


def hostile_file(folder: Path, table: pd.DataFrame) -> Path:
    path = folder / f"trials {HOSTILE['quotes']} <b>{HOSTILE['unicode']}.csv"
    table.to_csv(path, index=False)
    return path


# --- threshold-geometry with hostile group labels ---------------------------------------


GROUPS = [HOSTILE[k] for k in ("script", "markup", "unicode", "long")]


@pytest.fixture(scope="module")
def grouped_run(tmp_path_factory):
    from recipes.threshold_geometry import RECIPE

    folder = tmp_path_factory.mktemp("hostile-groups")
    rng = np.random.default_rng(11)
    distance = np.tile([1.0, 2, 4, 8, 12], len(GROUPS))
    group = np.repeat(GROUPS, 5)
    attempts = np.full(distance.size, 150)
    base = RECIPE.validate(pd.DataFrame({"distance": distance, "attempts": attempts, "successes": 0,
                                         "group": group}), {})
    sim = RECIPE.simulate(rng, base, {"spread": 0.03}, {"clearance": 0.25})
    table = sim.to_frame()[["distance", "attempts", "successes", "group"]]
    data = hostile_file(folder, table)
    out = folder / "out"
    # One spread per group (no pooling): the labels become a model coordinate.
    code = main(["check", "threshold-geometry", "--data", str(data), "--set", "clearance=0.25",
                 "--set", "pooling=none", "--out", str(out), *SMALL_RUN,
                 "--history", str(folder / "history.sqlite")])
    assert code == 0
    return out, data


def test_group_labels_are_escaped_in_the_report(grouped_run):
    out, data = grouped_run
    assert_safe_page((out / "report.html").read_text(encoding="utf-8"), [str(data)])


def test_group_labels_survive_in_the_posterior_file(grouped_run):
    out, _ = grouped_run
    tree = xr.open_datatree(out / "posterior.nc", engine="h5netcdf")
    assert list(tree["posterior"]["group"].values) == GROUPS


def test_hostile_file_name_survives_in_the_summary(grouped_run):
    out, data = grouped_run
    doc = json.loads((out / "summary.json").read_text(encoding="utf-8"))
    assert doc["data"]["path"] == str(data)


def test_notebook_of_a_hostile_run_is_valid_python(grouped_run):
    out, _ = grouped_run
    assert notebook_options(out / "notebook.ipynb")["clearance"] == "0.25"


# --- competing-risks: hostile column names, cohort labels, group labels, option values ------


@pytest.fixture(scope="module")
def outcome_run(tmp_path_factory):
    from recipes.competing_risks import RECIPE

    folder = tmp_path_factory.mktemp("hostile-outcomes")
    table = RECIPE.demo(np.random.default_rng(4)).table
    cohorts = sorted(table["cohort"].unique())[:4]
    table = table[table["cohort"].isin(cohorts)].rename(columns={"solved": OUTCOME_NAMES[0], "withdrawn": OUTCOME_NAMES[1]})
    names = [HOSTILE[k] for k in ("markup", "unicode", "math", "long", "template")]
    label = {c: f"{names[i % len(names)]} #{i}" for i, c in enumerate(cohorts)}
    table["group"] = [FIGURE_GROUPS[cohorts.index(c) % 2] for c in table["cohort"]]
    table["cohort"] = table["cohort"].map(label)
    data = hostile_file(folder, table)
    out = folder / "out"
    code = main(["check", "competing-risks", "--data", str(data), "--set",
                 f"outcomes={','.join(OUTCOME_NAMES)}", "--out", str(out), *SMALL_RUN,
                 "--history", str(folder / "history.sqlite")])
    assert code == 0
    return out, data, list(label.values())


def test_outcome_names_and_labels_are_escaped_in_the_report(outcome_run):
    out, data, _ = outcome_run
    page = (out / "report.html").read_text(encoding="utf-8")
    assert_safe_page(page, [str(data), *OUTCOME_NAMES])


def test_option_values_survive_in_the_summary(outcome_run):
    out, _, _ = outcome_run
    doc = json.loads((out / "summary.json").read_text(encoding="utf-8"))
    assert doc["design"]["outcomes"] == list(OUTCOME_NAMES)


def test_cohort_labels_survive_in_the_posterior_file(outcome_run):
    out, _, labels = outcome_run
    tree = xr.open_datatree(out / "posterior.nc", engine="h5netcdf")
    coords = {name: list(tree[g][name].values) for g in tree.children for name in tree[g].coords}
    assert sorted(coords["cohort"]) == sorted(labels)
    assert sorted(coords["group"]) == sorted(FIGURE_GROUPS)
    assert list(coords["outcome"]) == list(OUTCOME_NAMES)


def test_notebook_keeps_hostile_option_values(outcome_run):
    from recipes.competing_risks import RECIPE

    out, _, _ = outcome_run
    options = RECIPE.read_options(notebook_options(out / "notebook.ipynb"))
    assert options["outcomes"] == OUTCOME_NAMES


def test_design_label_names_list_options_as_written(outcome_run):
    out, _, _ = outcome_run
    page = _Page((out / "report.html").read_text(encoding="utf-8"))
    title = next(t for t in page.text if t.startswith("Model check:"))
    assert f"outcomes={','.join(OUTCOME_NAMES)}" in title


# --- option values that cannot be used -------------------------------------------------------


@pytest.mark.parametrize("value", [HOSTILE["script"], "0.2\n<b>second line</b>", "\x1b[2J" + HOSTILE["long"]])
def test_unusable_option_value_is_one_quoted_line(capsys, tmp_path, value):
    path = tmp_path / "t.csv"
    path.write_text("distance,attempts,successes\n1,100,90\n2,100,70\n")
    code = main(["check", "threshold-geometry", "--data", str(path), "--set", f"clearance={value}",
                 "--out", str(tmp_path / "out")])
    err = capsys.readouterr().err
    assert code == 2
    assert err.count("\n") == 1 and "\x1b" not in err  # control characters are shown quoted
    assert "option 'clearance'" in err


# --- a model file whose assumption is written in hostile text ----------------------------------


MODEL_FILE = '''"""A normal mean, with an assumption described in hostile text."""

import pymc as pm

from workbench.recipe import Assumption, Statistic


def build_model(data):
    with pm.Model() as model:
        mu = pm.Normal("mu", 0.0, 10.0)
        pm.Normal("y", mu, 1.0, observed=data["value"].to_numpy(float))
    return model


def _largest(data, outcomes, draws):
    return outcomes["y"].max(axis=1)


ASSUMPTIONS = [
    Assumption(key={key!r}, statement={statement!r},
               statistic=Statistic({stat!r}, {meaning!r}, _largest), advice={advice!r}),
]
'''
MODEL_TEXT = {"key": "tails_<b>&amp;", "stat": HOSTILE["quotes"], "meaning": HOSTILE["markup"],
              "statement": " ".join([HOSTILE["script"], HOSTILE["unicode"], HOSTILE["long"]]),
              "advice": HOSTILE["template"]}


@pytest.fixture(scope="module")
def model_file_run(tmp_path_factory):
    folder = tmp_path_factory.mktemp("hostile-model-file")
    model = folder / "hostile_model.py"
    model.write_text(MODEL_FILE.format(**MODEL_TEXT), encoding="utf-8")
    data = folder / "values.csv"
    pd.DataFrame({"value": np.random.default_rng(5).normal(1.0, 1.0, 30)}).to_csv(data, index=False)
    out = folder / "out"
    code = main(["check", str(model), "--data", str(data), "--out", str(out), *SMALL_RUN,
                 "--history", str(folder / "history.sqlite")])
    assert code == 0
    return out


def test_model_file_assumption_text_is_escaped_in_the_report(model_file_run):
    page = (model_file_run / "report.html").read_text(encoding="utf-8")
    assert_safe_page(page, [MODEL_TEXT["key"], MODEL_TEXT["statement"], MODEL_TEXT["stat"],
                            MODEL_TEXT["meaning"]])


def test_model_file_assumption_text_survives_in_the_summary(model_file_run):
    doc = json.loads((model_file_run / "summary.json").read_text(encoding="utf-8"))
    mine = next(a for a in doc["assumptions"] if a["key"] == MODEL_TEXT["key"])
    assert mine["statement"] == MODEL_TEXT["statement"]
    assert any(e["check"].endswith(MODEL_TEXT["stat"]) for e in mine["evidence"]), mine["evidence"]


def test_assumption_keys_that_differ_only_in_odd_characters_keep_distinct_anchors():
    from workbench.report.html import anchor

    keys = ["a<b", "a>b", "a b", "a-b", "a_b", "a&b", "a\"b", HOSTILE["script"], HOSTILE["markup"]]
    ids = [anchor(k) for k in keys]
    assert len(set(ids)) == len(keys)
    assert all(c.isalnum() or c in "-_" for i in ids for c in i)
    assert anchor("shared_spread") == "a-shared_spread"  # plain keys keep readable ids


# --- a hostile report in a real browser ---------------------------------------------------------


@pytest.mark.browser
@NEEDS_CHROMIUM
def test_hostile_reports_run_no_script_and_do_not_scroll_sideways_on_a_phone(model_file_run, grouped_run,
                                                                             visit):
    for folder, shown in ((model_file_run, HOSTILE["script"]), (grouped_run[0], str(grouped_run[1]))):
        v = visit(folder / "report.html", PHONE)
        v.page.wait_for_load_state("load")
        assert v.errors == []  # an alert() from the input would be recorded here
        assert v.page.evaluate("() => document.scripts.length") == 0
        # Folded evidence holds user text too: read and measure the page with every fold open.
        v.page.evaluate("() => document.querySelectorAll('details').forEach(d => d.open = true)")
        assert shown in v.page.inner_text("body")
        page_width, inner = v.page.evaluate("() => [document.scrollingElement.scrollWidth, innerWidth]")
        assert page_width <= inner
