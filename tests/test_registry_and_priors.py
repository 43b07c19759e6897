"""Recipe registry and the DIST(ARGS) prior syntax."""

from __future__ import annotations

import pytest
import scipy.stats as st

from workbench import registry
from workbench.cli import main
from workbench.errors import OptionError
from workbench.priors import parse_override, parse_prior

USER_RECIPE = '''
from recipes.threshold_geometry import RECIPE as BASE
from dataclasses import replace
RECIPE = replace(BASE, name="aiming-copy", summary="A copy for testing user folders.")
'''


def test_builtin_recipes_are_found_by_name():
    reg = registry.load()
    assert "threshold-geometry" in reg.recipes
    assert reg.get("threshold-geometry").source.endswith("threshold_geometry.py")


def test_recipes_command_lists_columns_options_parameters_and_assumptions(capsys):
    assert main(["recipes"]) == 0
    out = capsys.readouterr().out
    for text in ("threshold-geometry", "distance", "clearance", "spread", "shared_spread",
                 "angle_only", "independent_attempts"):
        assert text in out


def test_user_folder_adds_a_recipe_and_a_broken_file_is_reported_with_its_line(tmp_path, capsys):
    (tmp_path / "copy.py").write_text(USER_RECIPE)
    (tmp_path / "broken.py").write_text("x = 1\nRECIPE = undefined_name\n")
    reg = registry.load([str(tmp_path)])
    assert "aiming-copy" in reg.recipes and "threshold-geometry" in reg.recipes
    assert any(p.path.endswith("broken.py") and p.line == 2 and "NameError" in p.message
               for p in reg.problems)
    assert main(["recipes", "--recipes", str(tmp_path)]) == 0
    captured = capsys.readouterr()
    assert "aiming-copy" in captured.out and "broken.py:2" in captured.err


def test_environment_variable_adds_recipe_folders(tmp_path, monkeypatch):
    (tmp_path / "copy.py").write_text(USER_RECIPE)
    monkeypatch.setenv(registry.ENV_VAR, str(tmp_path))
    assert "aiming-copy" in registry.load().recipes


def test_syntax_error_in_a_recipe_file_names_file_and_line(tmp_path):
    (tmp_path / "bad.py").write_text("def f(:\n")
    reg = registry.load([str(tmp_path)])
    problem = next(p for p in reg.problems if p.path.endswith("bad.py"))
    assert problem.line == 1 and "SyntaxError" in problem.message


@pytest.mark.parametrize(
    "text, scipy_dist",
    [
        # Reference library: scipy.stats with PyMC's parameterisations.
        ("halfnormal(0.05)", st.halfnorm(scale=0.05)),
        ("lognormal(-3.5,0.3)", st.lognorm(s=0.3, scale=2.718281828459045 ** -3.5)),
        ("beta(2,8)", st.beta(2, 8)),
        ("normal(1,2)", st.norm(1, 2)),
    ],
)
def test_parsed_priors_match_scipy_densities(text, scipy_dist):
    import pymc as pm

    spec = parse_prior(text)
    x = scipy_dist.ppf([0.1, 0.5, 0.9])
    logp = pm.logp(spec.distribution(), x).eval()
    # PyTensor's log-beta function differs from scipy's around the 7th digit.
    assert logp == pytest.approx(scipy_dist.logpdf(x), abs=1e-5)


@pytest.mark.parametrize("text", ["halfnormal", "halfnormal(0.1", "normal(0,'1')", "exec(1)",
                                  "normal(0, 1); import os", "normal(nan, 1)"])
def test_malformed_priors_are_refused_without_evaluation(text):
    with pytest.raises(OptionError):
        parse_prior(text)


def test_override_names_parameter_and_distribution():
    name, spec = parse_override("spread=lognormal(-3.5, 0.3)")
    assert name == "spread" and str(spec) == "lognormal(-3.5,0.3)"


def test_automatic_pooling_keeps_two_groups_apart_and_pools_three():
    # Two groups inform a group-level spread by one difference: no partial pooling then.
    from workbench.recipe import choose_pooling

    assert choose_pooling({}, 1) == "complete"
    assert choose_pooling({"pooling": "auto"}, 2) == "none"
    assert choose_pooling({}, 3) == "partial"
    assert choose_pooling({"pooling": "partial"}, 2) == "partial"  # asked for: kept


def test_every_recipe_pools_two_groups_the_same_way():
    import numpy as np

    from workbench import registry
    from workbench.recipe import make_design

    for name in ("threshold-geometry", "timing-curve", "stage-transitions"):
        recipe = registry.load().get(name)
        demo = recipe.demo(np.random.default_rng(1))
        table = demo.table.copy()
        key = "cohort" if "cohort" in table else "distance"
        first = table[key].unique()[: max(1, len(table[key].unique()) // 2)]
        table["group"] = np.where(table[key].isin(first), "east", "west")
        data = make_design(recipe, demo.options, {}).validate(table)
        assert data.extra["pooling"] == "none", name
