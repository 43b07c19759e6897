"""Checks of the ``priors`` assumption: are the priors compatible with the data?

Two pieces of evidence:

* prior predictive coverage: where each observed summary statistic falls in
  its prior predictive distribution (a value in the far tail means the priors
  put almost no mass on data like these);
* power-scaling sensitivity of each free parameter to the prior and to the
  likelihood (ArviZ ``psense``); sensitivity to both at once is the signature of
  prior-data conflict.

References
----------
Box, G. E. P. (1980). Sampling and Bayes' inference in scientific modelling
and robustness. JRSS A 143(4), 383-430 (prior predictive checking).
Evans, M. and Moshonov, H. (2006). Checking for prior-data conflict.
Bayesian Analysis 1(4), 893-914 (check the sampling model first, then the
prior).
Kallioinen, N., Paananen, T., Bürkner, P.-C. and Vehtari, A. (2024).
Detecting and diagnosing prior and likelihood sensitivity with power-scaling.
Statistics and Computing 34, 57.
"""

from __future__ import annotations

import warnings

import numpy as np

from workbench.checks import Context, check
from workbench.findings import PRIORS, Finding
from workbench.recipe import likelihood_approximation, outcome_words


def free_parameters(fit) -> list[str]:
    """Names of the model's free random variables present in the posterior."""
    names = [rv.name for rv in fit.model.free_RVs]
    return [n for n in names if n in fit.idata["posterior"].data_vars]


def _summaries(values: np.ndarray, spread: bool = True) -> dict[str, np.ndarray]:
    """Summary statistics over the last axis (the rows of the table).

    ``spread=False`` keeps the mean alone: a likelihood that approximates its
    story with the same means but a wider spread (a recipe's documented
    ``approximate_likelihood``) makes the prior predictive sd too wide by
    construction, so it says nothing about the priors.
    """
    flat = values.reshape(values.shape[0], -1).astype(float)
    out = {"mean": flat.mean(axis=1)}
    if spread:
        out["sd"] = flat.std(axis=1)
    return out


@check
def prior_predictive_coverage(context: Context) -> list[Finding]:
    """Tail probability of each observed summary under the prior predictive."""
    fit = context.fit
    if "prior_predictive" not in fit.idata.children:
        return []
    prior_pred = fit.draws(group="prior_predictive")
    post_pred = (fit.draws(group="posterior_predictive")
                 if "posterior_predictive" in fit.idata.children else {})
    observed = fit.idata["observed_data"].to_dataset()
    spread = not likelihood_approximation(context.design, context.data)
    words = outcome_words(context.design)
    held = _widest_sd_ratio(fit)
    findings = []
    for name in observed.data_vars:
        if name not in prior_pred:
            continue
        sims = _summaries(prior_pred[name], spread)
        obs = _summaries(observed[name].values[None, ...], spread)
        for stat, simulated in sims.items():
            o = float(obs[stat][0])
            lo, hi = np.percentile(simulated, [1, 99])
            if lo == hi and np.isclose(o, lo):
                # The model fixes this statistic (counts that sum to the units
                # exposed) and the data have it: it says nothing about the priors.
                continue
            below = _share_below(simulated, o)
            tail = min(below, 1.0 - below)
            # The fitted model's own predictive: a statistic it misses too is the
            # likelihood's to explain before any prior (Evans and Moshonov 2006).
            posterior_p = None
            if name in post_pred:
                fitted = _share_below(_summaries(post_pred[name], spread)[stat], o)
                posterior_p = 2.0 * min(fitted, 1.0 - fitted)
            findings.append(
                Finding(
                    assumption=PRIORS,
                    kind="prior_coverage",
                    check=f"prior_coverage:{name}:{stat}",
                    value=o,
                    p_value=2.0 * tail,
                    detail=(
                        f"Observed {stat} of {words.get(name, name)} is {o:.4g}; the prior predictive puts 98% "
                        f"of its mass between {lo:.4g} and {hi:.4g} ({below:.1%} below the observed)."
                    ),
                    numbers={"share_below": below, "low": float(lo), "high": float(hi),
                             "posterior_p": posterior_p, "prior_sd_ratio": held},
                    figure="prior-predictive",
                )
            )
    return findings


def _widest_sd_ratio(fit) -> float | None:
    """The largest posterior/prior sd ratio over the free parameters' elements.

    Positive parameters are compared on the log scale. Near 1 the prior, not
    the data, sets some parameter: a fitted model that misses a statistic may
    then be held there by that prior.
    """
    if "prior" not in fit.idata.children or fit.model is None:
        return None
    prior, posterior = fit.draws(group="prior"), fit.draws()
    ratios = []
    for name in free_parameters(fit):
        if name not in prior:
            continue
        a = prior[name].reshape(len(prior[name]), -1).astype(float)
        b = posterior[name].reshape(len(posterior[name]), -1).astype(float)
        if (a > 0).all() and (b > 0).all():
            a, b = np.log(a), np.log(b)
        with np.errstate(invalid="ignore", divide="ignore"):
            ratio = b.std(axis=0) / a.std(axis=0)
        ratios += [float(r) for r in ratio if np.isfinite(r)]
    return max(ratios) if ratios else None


def _share_below(simulated: np.ndarray, observed: float) -> float:
    return float(np.mean(simulated < observed) + 0.5 * np.mean(simulated == observed))


def _element_label(idata, name: str, i: int, size: int) -> str:
    """The label of element ``i`` (row-major) of a parameter, by its coordinates where it has them."""
    from workbench.estimates import element_labels

    if size == 1:
        return name
    try:
        labels = element_labels(idata["posterior"][name])
    except KeyError:
        labels = []
    return labels[i] if len(labels) == size else f"{name}[{i}]"


def _prior_tails(prior: dict, posterior: dict, names: list[str], idata):
    """Per parameter: (label, posterior median, share of prior draws below it, prior draws).

    For a vector parameter, the element whose median sits furthest in a tail,
    labelled by its coordinates in ``idata``'s posterior.
    """
    for name in names:
        if name not in prior or name not in posterior:
            continue
        draws = prior[name].reshape(prior[name].shape[0], -1)
        medians = np.median(posterior[name].reshape(posterior[name].shape[0], -1), axis=0)
        share_below = (draws < medians).mean(axis=0)
        tail = np.minimum(share_below, 1.0 - share_below)
        i = int(np.argmin(tail))
        label = _element_label(idata, name, i, draws.shape[1])
        yield label, float(medians[i]), float(share_below[i]), int(draws.shape[0])


@check
def posterior_in_prior_tail(context: Context) -> list[Finding]:
    """Where each free parameter's posterior median falls among its prior draws.

    A median beyond (nearly) every prior draw means the data pulled the
    parameter to where its prior puts almost no mass: a prior-data conflict
    that names the parameter.
    """
    fit = context.fit
    if "prior" not in fit.idata.children:
        return []
    findings = []
    for label, median, share_below, n in _prior_tails(fit.draws(group="prior"), fit.draws(),
                                                      free_parameters(fit), fit.idata):
        findings.append(
            Finding(
                assumption=PRIORS,
                kind="prior_tail",
                check=f"prior_tail:{label}",
                value=median,
                detail=(f"Posterior median of {label} is {median:.4g}; {share_below:.1%} of "
                        f"{n} prior draws lie below it."),
                numbers={"parameter": label, "share_below": share_below, "prior_draws": n,
                         "in_model_file": bool(getattr(context.design, "is_model_file", False))},
            )
        )
    return findings


@check
def prior_tail_under_relaxations(context: Context) -> list[Finding]:
    """The prior-tail check re-scored under each relaxed model.

    A misfit can drag a parameter beyond its prior (units stuck in a stage
    make staying look nearly certain); when the relaxed model of the failing
    assumption puts it back inside its prior, the verdict step calls the
    conflict a symptom of that failure.
    """
    fit = context.fit
    if "prior" not in fit.idata.children:
        return []
    prior, names = fit.draws(group="prior"), free_parameters(fit)
    findings = []
    for assumption in context.design.assumptions:
        relaxation = assumption.relaxation
        if relaxation is None or relaxation.parameter not in context.relaxed:
            continue
        tails = list(_prior_tails(prior, context.relaxed[relaxation.parameter].draws(), names, fit.idata))
        beyond = [label for label, _, below, _ in tails if min(below, 1.0 - below) == 0.0]
        findings.append(
            Finding(
                assumption=PRIORS,
                kind="prior_tail_under_relaxation",
                check=f"prior_tail|{relaxation.parameter}",
                value=float(len(beyond)),
                detail=(f"With {assumption.key} relaxed ({relaxation.parameter}), "
                        + (f"the data put {', '.join(beyond)} beyond every prior draw."
                           if beyond else "every posterior median lies among the prior draws.")),
                numbers={"relaxation_of": assumption.key, "beyond_prior": beyond},
            )
        )
    return findings


@check
def prior_sensitivity(context: Context) -> list[Finding]:
    """Power-scaling sensitivity of each free parameter to prior and likelihood."""
    import arviz as az

    fit = context.fit
    groups = set(fit.idata.children)
    if not {"log_prior", "log_likelihood"} <= groups:
        return []
    names = free_parameters(fit)
    if not names:
        return []
    try:
        with warnings.catch_warnings():
            warnings.simplefilter("ignore")
            prior = az.psense(fit.idata, var_names=names, group="prior")
            likelihood = az.psense(fit.idata, var_names=names, group="likelihood")
    except Exception as err:  # psense can fail on degenerate draws; record, don't abort
        return [
            Finding(PRIORS, "prior_sensitivity_failed", "prior_sensitivity", None,
                    detail=f"Power-scaling sensitivity could not be computed ({type(err).__name__}: {err}).")
        ]
    findings = []
    for name in names:
        # Flat over every dimension: a parameter may have several (group x outcome).
        ps = np.asarray(prior[name].values, dtype=float).ravel()
        ls = np.asarray(likelihood[name].values, dtype=float).ravel()
        i = int(np.nanargmax(ps)) if np.isfinite(ps).any() else 0
        label = _element_label(fit.idata, name, i, ps.size)
        findings.append(
            Finding(
                assumption=PRIORS,
                kind="prior_sensitivity",
                check=f"prior_sensitivity:{label}",
                value=float(ps[i]),
                detail=(
                    f"Giving the prior more or less weight moves the posterior of {label} by "
                    f"{ps[i]:.3f}; giving the data more or less weight moves it by {ls[i]:.3f} "
                    f"(power-scaling distance)."
                ),
                numbers={"parameter": label, "prior": float(ps[i]), "likelihood": float(ls[i]),
                         # A model file writes its priors in code: --prior cannot change them.
                         "in_model_file": bool(getattr(context.design, "is_model_file", False))},
            )
        )
    return findings
