"""Power of an ideal test for a planted fault on one layout.

The ideal test knows the true generating model: it is the likelihood-ratio
test of that model (the recipe's model with the planted fault's expansion)
against its null (the recipe's model), both fitted by maximum likelihood
with scipy, at the 0.5% level. Its power is measured by simulation: tables
drawn from the true model on the layout, the share whose likelihood ratio
passes the critical value.

Critical values are asymptotic: chi-square with 1 degree of freedom for a
parameter free on both sides of its null; for a parameter bounded at its
null (a share that never ends, extra variation) the statistic is a 50:50
mixture of 0 and chi-square_1 (Self and Liang 1987), so chi-square_1 at
twice the level. A cohort effect on the timing scale is tested as fixed
effects (one log scale per cohort, C - 1 degrees of freedom): the marginal
likelihood of a random effect has no closed form, and the fixed-effects test
is the likelihood-ratio test that needs no integral.

The likelihoods are the recipe's own (the PyMC model's observed log
density, compiled once per layout, maximised over the free variables on
their unconstrained scale). For stage counts of stage-transitions that
likelihood is the recipe's documented approximation, so there the power is
that of the approximate likelihood. The timing-curve eventual share that
drifts over cohorts has no expansion in the recipe; its test is written
here in NumPy (a linear drift of the eventual share's log-odds over the
cohorts' order, 1 degree of freedom).

References
----------
Self, S. G. and Liang, K.-Y. (1987). Asymptotic properties of maximum
likelihood estimators and likelihood ratio tests under nonstandard
conditions. JASA 82(398), 605-610 (from memory).
"""

from __future__ import annotations

import numpy as np
from scipy import optimize, stats

LEVEL = 0.005
# Parameters whose null lies on the boundary of their range.
BOUNDED = {"never", "unresolved", "extra_failure", "overdispersion", "dormant"}


def critical_value(parameter: str, df: int = 1) -> float:
    if df == 1 and parameter in BOUNDED:
        return float(stats.chi2.ppf(1 - 2 * LEVEL, 1))
    return float(stats.chi2.ppf(1 - LEVEL, df))


class _Likelihood:
    """The observed log density of a PyMC model and its gradient, over unconstrained free variables."""

    def __init__(self, model, observed: dict):
        import pytensor
        import pytensor.tensor as pt

        self.model = model
        self.values = list(model.value_vars)
        logp = model.logp(vars=model.observed_RVs, jacobian=False, sum=True)
        grads = pt.grad(logp, self.values)
        self.fn = pytensor.function(self.values, [logp, *grads], on_unused_input="ignore")
        point = model.initial_point()
        self.names = [v.name for v in self.values]
        self.shapes = [np.shape(point[n]) for n in self.names]
        self.sizes = [int(np.prod(s)) for s in self.shapes]
        self.start = np.concatenate([np.ravel(point[n]) for n in self.names]).astype(float)
        self.containers = {name: model[name] for name in observed}

    def set_data(self, observed: dict) -> None:
        for name, values in observed.items():
            self.containers[name].set_value(np.asarray(values, dtype=self.containers[name].dtype))

    def _split(self, x):
        out, i = [], 0
        for shape, size in zip(self.shapes, self.sizes):
            out.append(np.reshape(x[i:i + size], shape))
            i += size
        return out

    def maximise(self, start: np.ndarray) -> tuple[float, np.ndarray]:
        def negative(x):
            value, *grads = self.fn(*self._split(x))
            if not np.isfinite(value):
                return 1e12, np.zeros_like(x)
            return -float(value), -np.concatenate([np.ravel(g) for g in grads])

        best = optimize.minimize(negative, start, jac=True, method="L-BFGS-B")
        return -float(best.fun), best.x

    def start_from(self, other: "_Likelihood", x: np.ndarray, nudge: dict) -> np.ndarray:
        """A start for this model: the other model's optimum where names match, ``nudge`` elsewhere."""
        mine = self._split(self.start.copy())
        theirs = dict(zip(other.names, other._split(x)))
        for j, name in enumerate(self.names):
            if name in theirs and np.shape(theirs[name]) == self.shapes[j]:
                mine[j] = theirs[name]
            elif name in nudge:
                mine[j] = np.full(self.shapes[j], nudge[name])
        return np.concatenate([np.ravel(m) for m in mine])


def _relaxation_of(design, parameter: str):
    for a in design.assumptions:
        if a.relaxation is not None and a.relaxation.parameter == parameter:
            return a.relaxation
    raise KeyError(parameter)


def power(design, base, truth: dict, planted: dict, scenario: str, sims: int, rng, simulate) -> float:
    """Share of ``sims`` tables from the true model on ``base``'s layout that the ideal test rejects."""
    (parameter, _), = planted.items()
    if parameter == "eventual_drift":
        return _drift_power(design, base, truth, planted, sims, rng, simulate)
    null = _Likelihood(design.build(base), design.observed(base))
    alt = _Likelihood(design.build(base, _relaxation_of(design, parameter)), design.observed(base))
    df = len(base.labels["cohort"]) - 1 if parameter == "cohort_sd" else 1
    crit = critical_value(parameter, df)
    # Starting values of the expansion just off its null, on the unconstrained scale.
    nudge = {"cohort_z": 0.0, "cohort_sd_log__": np.log(0.3), "curve_power": 0.0,
             "spread_slope": 0.0, "stay_drift": 0.0, "covariate_curvature": 0.0,
             "shape_slope": 0.0}
    nudge.update({name: -4.0 for name in alt.names if name not in null.names and name not in nudge})
    rejected = 0
    for _ in range(sims):
        data = simulate(design, base, truth, planted, rng)
        observed = design.observed(data)
        null.set_data(observed)
        alt.set_data(observed)
        l0, x0 = null.maximise(null.start)
        l1, _ = alt.maximise(alt.start_from(null, x0, nudge))
        rejected += 2.0 * max(l1 - l0, 0.0) > crit
    return rejected / sims


def _drift_power(design, base, truth, planted, sims, rng, simulate) -> float:
    """Power of the 1-df test of a linear drift of the eventual share's log-odds over cohorts."""
    from scipy.special import expit

    from workbench import cohorts, curves

    age = cohorts.relative_age(base)
    n = len(base.labels["cohort"])
    position = (np.linspace(-0.5, 0.5, n) if n > 1 else np.zeros(1))[base["cohort"]]
    family = design.options["family"]

    def loglik(theta, counts, drift: bool):
        log_scale, log_shape, a = theta[:3]
        b = theta[3] if drift else 0.0
        cum = expit(a + b * position) * curves.cdf(family, age, np.exp(log_scale), np.exp(log_shape))
        p = cohorts.cell_probabilities(base, cum[:, None])
        return float((counts * np.log(p)).sum())

    def fit(counts, drift, start):
        best = optimize.minimize(lambda t: -loglik(t, counts, drift), start, method="Nelder-Mead",
                                 options={"xatol": 1e-5, "fatol": 1e-6, "maxiter": 4000})
        return -float(best.fun), best.x

    crit = critical_value("eventual_drift")
    from scipy.special import logit

    start = np.array([np.log(truth["scale"]), np.log(truth["shape"]), logit(truth["eventual"])])
    rejected = 0
    for _ in range(sims):
        counts = cohorts.cell_counts(simulate(design, base, truth, planted, rng))
        l0, x0 = fit(counts, False, start)
        l1, _ = fit(counts, True, np.append(x0, 0.0))
        rejected += 2.0 * max(l1 - l0, 0.0) > crit
    return rejected / sims
