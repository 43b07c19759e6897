"""Report figures: each observed point with its own predictive interval, axes
that name what PSIS-LOO leaves out, ranges robust to outliers, densities
inside their support, tick labels and legends that can be read.

Figures are drawn by matplotlib and embedded as PNG; what a reader sees is
checked on the drawn figure itself: artists found by their gid, and the
boxes of tick labels as the renderer lays them out.
"""

from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from workbench.checks.loo import loo_terms
from workbench.recipe import make_design
from workbench.report import plots


def by_gid(fig, gid):
    return [a for ax in fig.axes for a in ax.get_children() if a.get_gid() == gid]


def marked_points(fig) -> set[tuple[float, float]]:
    return {(round(float(x), 9), round(float(y), 9)) for line in by_gid(fig, "observed-outside")
            for x, y in zip(line.get_xdata(), line.get_ydata())}


def whisker_ends(fig) -> np.ndarray:
    """(low, high) of every drawn interval, in drawing order."""
    segments = [s for c in by_gid(fig, "predictive-interval") for s in c.get_segments()]
    return np.array([(s[0][1], s[1][1]) for s in segments])


# --- predictive interval of each observed point --------------------------------------------------


def test_each_point_has_its_central_90_percent_interval_and_points_outside_are_marked():
    rng = np.random.default_rng(3)
    mu = np.linspace(0.0, 9.0, 10)
    replicated = rng.normal(mu, 1.0, size=(20000, mu.size))
    observed = mu.copy()
    observed[2] += 3.0
    observed[9] -= 3.0
    observed[5] += 1.0  # inside: 1 sd from its centre
    fig = plots.predictive_by_covariate(np.arange(10), observed, None, replicated, "x", "y")
    # Reference: scipy.stats.norm.ppf, the 5% and 95% quantiles of N(mu, 1).
    ends = whisker_ends(fig)
    np.testing.assert_allclose(ends[:, 0], mu + stats.norm.ppf(0.05), atol=0.05)
    np.testing.assert_allclose(ends[:, 1], mu + stats.norm.ppf(0.95), atol=0.05)
    assert marked_points(fig) == {(2.0, round(observed[2], 9)), (9.0, round(observed[9], 9))}
    labels = fig.axes[0].get_legend_handles_labels()[1]
    assert "outside its interval (2 of 10)" in labels


def threshold_inputs(draws=400):
    from recipes.threshold_geometry import RECIPE, success_probability

    rng = np.random.default_rng(5)
    distance = np.array([1.0, 2, 3, 5, 8, 12, 16, 20])
    attempts = np.full(distance.size, 200)
    p = success_probability(distance, 0.25, 0.03)
    successes = rng.binomial(attempts, p)
    successes[5] = int(attempts[5] * p[5] * 0.6)  # far below what the fit replicates
    data = RECIPE.validate(pd.DataFrame({"distance": distance, "attempts": attempts, "successes": successes}), {})
    spread = rng.normal(0.03, 0.0005, draws)
    fitted = success_probability(distance[None, :], 0.25, spread[:, None])
    predictive = {"y": rng.binomial(attempts, fitted)}
    return RECIPE, data, {"spread": spread, "p": fitted}, predictive


def test_threshold_figure_marks_the_distance_whose_share_falls_outside_its_interval():
    recipe, data, posterior, predictive = threshold_inputs()
    fig = recipe.figure(data, {"clearance": 0.25}, posterior, predictive)
    share = data["successes"] / data["attempts"]
    rates = predictive["y"] / data["attempts"]
    low, high = np.percentile(rates, [5, 95], axis=0)
    expected = {(float(d), round(float(s), 9)) for d, s, lo, hi in zip(data["distance"], share, low, high)
                if not lo <= s <= hi}
    assert (12.0, round(float(share[5]), 9)) in expected
    assert marked_points(fig) == expected
    # One whisker per distance, on the share scale.
    ends = whisker_ends(fig)
    assert len(ends) == data.rows and ends.min() >= 0 and ends.max() <= 1


def timing_inputs(draws=300):
    from recipes.timing_curve import RECIPE
    from workbench import cohorts

    options = RECIPE.read_options({"family": "weibull", "eventual": "estimate"})
    rows = [{"cohort": f"c{c}", "age": a, "exposed": 120, "events": 0} for c in range(4) for a in (2, 4, 8, 16)]
    base = RECIPE.validate(pd.DataFrame(rows), options)
    truth = {"scale": 0.7, "shape": 1.8, "eventual": 0.6}
    rng = np.random.default_rng(9)
    observed = RECIPE.simulate(rng, base, truth, options)
    table = observed.to_frame()[["cohort", "age", "exposed", "events"]]
    # Cohort c2 reports at its first look the events of its last: far more than its curve allows.
    c2 = table["cohort"] == "c2"
    table.loc[c2, "events"] = table.loc[c2 & (table["age"] == 16), "events"].iloc[0]
    data = RECIPE.validate(table, options)
    replicated = np.stack([cohorts.observed(RECIPE.simulate(rng, data, truth, options))["counts"]
                           for _ in range(draws)])
    posterior = {"scale_group": np.full((draws, 1, 1), truth["scale"]),
                 "shape": np.full((draws, 1), truth["shape"]), "share": np.full((draws, 1), truth["eventual"])}
    return RECIPE, data, options, posterior, {"y": replicated}


def test_cohort_figure_gives_every_row_the_interval_of_its_replicated_cumulative_share():
    from workbench import cohorts

    recipe, data, options, posterior, predictive = timing_inputs()
    fig = recipe.figure(data, options, posterior, predictive)
    share = data["events"] / data["exposed"]
    rep = cohorts.cumulative_counts(data, predictive["y"])[..., 0] / data["exposed"]
    low, high = np.percentile(rep, [5, 95], axis=0)
    ends = whisker_ends(fig)
    np.testing.assert_allclose(ends, np.column_stack([low, high]))
    outside = {(float(a), round(float(s), 9)) for a, s, lo, hi in zip(data["age"], share, low, high)
               if not lo <= s <= hi}
    assert marked_points(fig) == outside
    c2_first = np.flatnonzero((np.asarray(data.labels["cohort"])[data["cohort"]] == "c2") & (data["age"] == 2))[0]
    assert (2.0, round(float(share[c2_first]), 9)) in outside


def test_cohort_figure_without_replicated_counts_still_draws_the_points():
    recipe, data, options, posterior, _ = timing_inputs(draws=50)
    fig = recipe.figure(data, options, posterior, {})
    assert not by_gid(fig, "predictive-interval")
    assert fig.axes[0].lines


def stage_inputs(stay_factor: float):
    from recipes import stage_transitions as st

    rng = np.random.default_rng(4)
    scenario = st.RECIPE.demo(rng)
    options = st.RECIPE.read_options(scenario.options)
    data = st.RECIPE.validate(scenario.table, options)
    truth = np.array(st.DEMO_TRUTH["transition"])
    wrong = truth.copy()
    wrong[0, 0] = min(0.95, truth[0, 0] * stay_factor)  # applicants stay longer than they do
    wrong[0] = np.where(np.arange(4) == 0, wrong[0, 0], truth[0] * (1 - wrong[0, 0]) / truth[0, 1:].sum())
    matrix = truth if stay_factor == 1 else wrong
    return st.RECIPE, data, options, {"transition_group": np.broadcast_to(matrix, (200, 1, 4, 4)).copy()}


def outside_count(fig) -> tuple[int, int]:
    outside = sum(len(line.get_xdata()) for line in by_gid(fig, "observed-outside"))
    return outside, len(whisker_ends(fig))


def test_stage_figure_marks_few_points_under_the_true_chain_and_most_under_a_wrong_one():
    recipe, data, options, posterior = stage_inputs(1.0)
    outside, shown = outside_count(recipe.figure(data, options, posterior, {}))
    assert shown > 20
    # 90% intervals: about a tenth outside when the chain is the one that made the data.
    assert outside <= 0.25 * shown
    recipe, data, options, posterior = stage_inputs(1.9)
    wrong_outside, _ = outside_count(recipe.figure(data, options, posterior, {}))
    assert wrong_outside >= 0.5 * shown


# --- what PSIS-LOO leaves out -------------------------------------------------------------------


def test_loo_terms_are_named_by_distance_cohort_or_step():
    from recipes.threshold_geometry import RECIPE as THRESHOLD

    recipe, data, options, _, _ = timing_inputs(draws=2)
    design = make_design(recipe, {"family": "weibull", "eventual": "estimate"}, {})
    assert loo_terms(design, data, 4) == ("cohort", ["cohort c0", "cohort c1", "cohort c2", "cohort c3"])
    _, tdata, _, _ = threshold_inputs(draws=2)
    unit, labels = loo_terms(make_design(THRESHOLD, {"clearance": "0.25"}, {}), tdata, tdata.rows)
    assert unit == "distance" and labels[:2] == ["distance 1", "distance 2"]
    srecipe, sdata, _, _ = stage_inputs(1.0)
    steps = sdata.extra["step"].size
    unit, labels = loo_terms(make_design(srecipe, {k: str(v) for k, v in srecipe.demo(
        np.random.default_rng(4)).options.items()}, {}), sdata, steps)
    assert unit == "step" and labels[0].startswith("cohort intake-01, from period ")
    assert loo_terms(None, tdata, 3) == ("row", ["row 1", "row 2", "row 3"])


def test_pareto_k_axis_names_the_cohorts_and_keeps_their_labels_apart():
    names = [f"cohort tray-{i:02d}" for i in range(1, 15)]
    fig = plots.pareto_k(np.linspace(0, 0.9, 14), 0.7, "cohort", names)
    ax = fig.axes[0]
    assert ax.get_xlabel() == "cohort left out (14 cohorts)"
    assert [t.get_text() for t in ax.get_xticklabels()] == [n.removeprefix("cohort ") for n in names]
    plots.keep_tick_labels_apart(fig)
    assert plots.overlapping_tick_labels(fig) == []


def test_pareto_k_of_many_cohorts_numbers_them_without_overlap():
    fig = plots.pareto_k(np.zeros(97), 0.7, "cohort", [f"cohort c{i}" for i in range(97)])
    assert "numbered from 1 (97 cohorts)" in fig.axes[0].get_xlabel()
    plots.keep_tick_labels_apart(fig)
    assert plots.overlapping_tick_labels(fig) == []


def test_report_loo_text_and_caption_name_cohorts_not_rows():
    from workbench.report.html import high_pareto_k, pareto_caption

    assert pareto_caption("cohort", 14, 0.7, 97).startswith(
        "Pareto k of each cohort in PSIS-LOO (14 cohorts; each term leaves one cohort out of a table of 97 rows)")
    assert high_pareto_k({"unit": "cohort", "bad_pareto_k": [1], "labels": ["cohort a", "cohort b"]}) == ["cohort b"]


# --- ranges, supports, ticks, legends ----------------------------------------------------------------


def test_statistic_histogram_is_not_stretched_by_a_few_extreme_replicates():
    rng = np.random.default_rng(1)
    replicated = np.concatenate([rng.normal(0.02, 0.008, 1188), rng.normal(-1.97, 0.01, 12)])
    fig = plots.statistic_check(0.03, replicated, "nearest_shortfall", 0.5)
    low, high = fig.axes[0].get_xlim()
    assert low > -0.1 and high < 0.1
    assert "12 of 1200 replicated values below the axis" in fig.axes[0].get_title(loc="left")


def test_statistic_histogram_keeps_an_observed_value_far_out():
    replicated = np.random.default_rng(2).normal(0.0, 1.0, 1000)
    fig = plots.statistic_check(25.0, replicated, "t", 0.0)
    assert fig.axes[0].get_xlim()[1] >= 25.0


@pytest.mark.parametrize("support", [(0.0, np.inf), (0.0, 1.0)])
def test_relaxation_density_stays_inside_the_support(support):
    draws = np.abs(np.random.default_rng(4).normal(0.0, 0.001, 4000))  # a share near its bound 0
    fig = plots.relaxation_posterior(draws, 0.0, 0.01, "extra_failure", support)
    ax = fig.axes[0]
    assert ax.get_xlim()[0] >= support[0]
    drawn = [p.get_window_extent().transformed(ax.transData.inverted()) for p in ax.patches]
    assert min(b.x0 for b in drawn) >= support[0] - 1e-12


def test_tick_labels_that_would_collide_are_thinned_before_the_figure_is_kept(monkeypatch):
    draws = np.random.default_rng(4).normal(0.0, 0.0004, 4000)  # a slope on the whole real line
    fig = plots.relaxation_posterior(draws, 0.0, 0.01, "spread_slope")
    assert plots.overlapping_tick_labels(fig)  # matplotlib's own ticks collide at this width ...
    kept = []
    monkeypatch.setattr(plots.plt, "close", lambda f: kept.append(plots.overlapping_tick_labels(f)))
    plots.to_data_uri(fig)
    assert kept == [[]]  # ... and no longer in the figure the report embeds


def test_support_of_a_relaxation_parameter_comes_from_the_model():
    import pymc as pm

    from workbench.report.html import parameter_support

    class Fitted:
        model = None

    with pm.Model() as model:
        pm.Beta("extra_failure", 1, 20)
        pm.HalfNormal("cohort_sd", 0.3)
        pm.Normal("spread_slope", 0, 0.5)
        pm.Uniform("lift", -2, 3)
    Fitted.model = model
    assert parameter_support(Fitted, None, "extra_failure") == (0.0, 1.0)
    assert parameter_support(Fitted, None, "cohort_sd") == (0.0, np.inf)
    assert parameter_support(Fitted, None, "spread_slope") == (-np.inf, np.inf)
    assert parameter_support(Fitted, None, "lift") == (-2.0, 3.0)


def test_compare_legend_keeps_long_design_labels_whole():
    from workbench.compare import pointwise_figure

    long_a = "timing-curve:family=loglogistic:eventual=estimate:pooling=partial"
    long_b = "timing-curve:family=weibull:eventual=estimate:pooling=partial"
    doc = {"reference": long_b, "comparison": [{"design": long_b}, {"design": long_a}],
           "pointwise": {"x": list(range(12)), "covariate": "age",
                         "elpd": {long_b: [0.0] * 12, long_a: list(np.linspace(-2, 1, 12))}}}
    fig = pointwise_figure(doc)
    plots.shorten_texts(fig)
    legend = fig.axes[0].get_legend()
    text = " ".join(t.get_text() for t in legend.get_texts()).replace("\n", "")
    assert "…" not in text and long_a in text and long_b in text
    # The legend sits below the axes, not over the points.
    fig.canvas.draw()
    assert legend.get_window_extent().y1 <= fig.axes[0].get_window_extent().y0


def test_a_figure_made_without_pyplot_is_embedded_with_its_ticks_apart():
    from matplotlib.figure import Figure

    fig = Figure(figsize=(3.0, 2.0))
    ax = fig.add_subplot()
    ax.plot(np.linspace(-0.01, 0.01, 5), np.arange(5))
    assert plots.to_data_uri(fig).startswith("data:image/png;base64,")
    assert plots.overlapping_tick_labels(fig) == []


# --- curves at chosen covariate values --------------------------------------------------------------

# Invented: 300 units with a three-level site and a dose; Weibull timing with
# scale 1 (relative to the median time) and shape 2, an eventual share of 0.7.
COVARIATE_CURVE = {"scale": 1.0, "shape": 2.0, "eventual": 0.7}


def covariate_inputs(covariates: str, time_effect, share_effect, draws=40):
    from recipes.timing_curve import RECIPE

    rng = np.random.default_rng(8)
    n = 300
    frame = pd.DataFrame({"time": rng.uniform(2.0, 4.0, n), "event": 0, "site": rng.choice(["a", "b", "c"], n),
                          "dose": np.round(rng.gamma(4.0, 1.5, n), 1)})
    frame.loc[0, "event"] = 1
    options = RECIPE.read_options({"covariates": covariates})
    data = RECIPE.validate(frame, options)
    truth = {**COVARIATE_CURVE, "time_effect": np.asarray(time_effect, dtype=float),
             "share_effect": np.asarray(share_effect, dtype=float)}
    sim = RECIPE.simulate(rng, data, truth, options)
    data = RECIPE.validate(frame.assign(time=sim["time"], event=sim["code"]), options)
    e = len(data.extra["covariates"].effects)
    # Every draw at the truth: the posterior median is the true curve.
    posterior = {"scale_group": np.full((draws, 1, 1), truth["scale"]), "shape": np.full((draws, 1), truth["shape"]),
                 "share": np.full((draws, 1), truth["eventual"]),
                 "time_effect": np.tile(truth["time_effect"], (draws, 1)).reshape(draws, e),
                 "share_effect": np.tile(truth["share_effect"], (draws, 1)).reshape(draws, e)}
    return RECIPE, data, options, posterior, frame.assign(time=sim["time"], event=sim["code"])


def fitted_curves(fig):
    return by_gid(fig, "fitted-curve")


def test_a_label_covariate_draws_one_fitted_curve_per_level_against_its_units():
    recipe, data, options, posterior, _ = covariate_inputs("site", [0.5, -0.5], [0.0, 0.0])
    fig, caption = recipe.figure(data, options, posterior, {})
    lines = fitted_curves(fig)
    assert [line.get_label() for line in lines] == ["site a", "site b", "site c"]
    assert "site at each level: a (reference), b, c" in caption
    # Site b's times are exp(0.5) as long: its curve lies below a's, c's above.
    at = np.searchsorted(lines[0].get_xdata(), data.extra["age_ref"])
    a, b, c = (line.get_ydata()[at] for line in lines)
    assert b < a < c
    # One Kaplan-Meier estimate per level, from that level's units.
    assert len(by_gid(fig, "observed-estimate")) == 3 and "Kaplan-Meier" in caption


def test_a_numeric_covariate_draws_its_quartiles_on_its_own_scale():
    from workbench.wording import number

    recipe, data, options, posterior, frame = covariate_inputs("dose", [-0.4], [0.6])
    fig, caption = recipe.figure(data, options, posterior, {})
    lines = fitted_curves(fig)
    quartiles = np.quantile(frame["dose"], [0.25, 0.5, 0.75])
    assert len(lines) == 3
    assert (f"dose at its lower quartile {number(quartiles[0])}, median {number(quartiles[1])}, "
            f"upper quartile {number(quartiles[2])}") in caption
    assert lines[2].get_label() == f"dose {number(quartiles[2])} (upper quartile)"
    # Reference: scipy.stats.weibull_min at the timing scale exp(effect * z)
    # and the eventual share expit(logit(0.7) + effect * z), z the
    # standardised upper quartile.
    z = (quartiles[2] - frame["dose"].mean()) / frame["dose"].std(ddof=0)
    share = 1.0 / (1.0 + np.exp(-(np.log(0.7 / 0.3) + 0.6 * z)))
    t = lines[2].get_xdata() / data.extra["age_ref"]
    expected = share * stats.weibull_min(2.0, scale=np.exp(-0.4 * z)).cdf(t)
    np.testing.assert_allclose(lines[2].get_ydata(), expected, atol=1e-9)


def test_more_than_six_combinations_vary_only_the_covariate_that_moves_the_curve_most():
    # Site (three levels) by dose (three quartiles): nine curves would not read;
    # the dose moves the curve far more than the site does.
    recipe, data, options, posterior, _ = covariate_inputs("site,dose", [0.02, -0.02, -0.8], [0.0, 0.0, 0.0])
    fig, caption = recipe.figure(data, options, posterior, {})
    assert [line.get_label().split(" (")[0].split(" ")[0] for line in fitted_curves(fig)] == ["dose"] * 3
    assert "only dose varies" in caption and "site at its reference level a" in caption


def test_cohort_counts_with_a_label_covariate_give_each_row_its_interval_in_its_level_colour():
    from recipes.timing_curve import RECIPE
    from workbench import cohorts

    options = RECIPE.read_options({"covariates": "soil"})
    rows = [{"cohort": f"c{c}", "age": a, "exposed": 150, "events": 0, "soil": ("clay", "loam")[c % 2]}
            for c in range(6) for a in (2, 4, 8, 16)]
    frame = pd.DataFrame(rows)
    base = RECIPE.validate(frame, options)
    truth = {"scale": 0.8, "shape": 1.8, "eventual": 0.6, "time_effect": np.array([0.7]),
             "share_effect": np.array([0.0])}
    rng = np.random.default_rng(2)
    data = RECIPE.validate(frame.assign(events=RECIPE.simulate(rng, base, truth, options)["events"]), options)
    replicated = np.stack([cohorts.observed(RECIPE.simulate(rng, data, truth, options))["counts"]
                           for _ in range(200)])
    posterior = {"scale_group": np.full((200, 1, 1), 0.8), "shape": np.full((200, 1), 1.8),
                 "share": np.full((200, 1), 0.6), "time_effect": np.full((200, 1), 0.7),
                 "share_effect": np.zeros((200, 1))}
    fig, caption = RECIPE.figure(data, options, posterior, {"y": replicated})
    lines = fitted_curves(fig)
    assert [line.get_label() for line in lines] == ["soil clay", "soil loam"]
    whiskers = by_gid(fig, "predictive-interval")
    assert [w.get_colors()[0][:3].round(3).tolist() for w in whiskers] == [
        np.round(__import__("matplotlib").colors.to_rgb(line.get_color()), 3).tolist() for line in lines]
    assert len(whisker_ends(fig)) == data.rows
    assert "coloured by the value it is nearest" in caption
