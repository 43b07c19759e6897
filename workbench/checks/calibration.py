"""Calibration check: turn a simulation-based calibration into findings for
the ``implementation`` assumption.

One finding per ranked quantity (each scalar parameter element and the
log-likelihood) with the uniformity test's p-value and the shape of any
departure, and one finding for the replicates that failed. The numbers are
computed by :mod:`workbench.calibration`; this check only reports them.

References
----------
Talts, S., Betancourt, M., Simpson, D., Vehtari, A. and Gelman, A. (2018).
Validating Bayesian inference algorithms with simulation-based calibration.
arXiv:1804.06788.
Säilynoja, T., Bürkner, P.-C. and Vehtari, A. (2022). Graphical test for
discrete uniformity and its applications in goodness-of-fit evaluation and
multiple sample comparison. Statistics and Computing 32, 32.
"""

from __future__ import annotations

from workbench.checks import Context, check
from workbench.findings import IMPLEMENTATION, Finding
from workbench.recipe import likelihood_approximation
from workbench.wording import p_equals

# Figure names the report uses for the calibration plots.
ECDF_FIGURE = "calibration-ecdf"
HISTOGRAM_FIGURE = "calibration-ranks"


def calibration_findings(result, approximate_likelihood: str = "") -> list[Finding]:
    """Findings of a :class:`workbench.calibration.CalibrationResult`.

    Each quantity's finding carries ``tests`` (how many quantities were
    tested, for the verdict's multiplicity correction), the departure's
    ``shape`` and ``direction``, and whether the simulator was independent.
    ``approximate_likelihood`` (the recipe's reason, when its likelihood only
    approximates the story) travels with the log-likelihood's finding.
    """
    from workbench.calibration import LOG_LIKELIHOOD

    tests = len(result.tests)
    used = len(result.replicates)
    source = ("simulated by the recipe's own simulator" if result.checks_model_code
              else "simulated from the model's own prior predictive")
    findings = []
    for name, test in result.tests.items():
        findings.append(Finding(
            assumption=IMPLEMENTATION,
            kind="calibration",
            check=f"calibration:{name}",
            value=test.shift_z if test.shape == "slope" else test.spread_z,
            p_value=test.p_value,
            detail=(
                f"Ranks of {name} among {result.L} posterior draws over {used} replicates "
                f"{source}: mean-rank z = {test.shift_z:+.2f}, outer-half z = {test.spread_z:+.2f} "
                f"(ECDF test {_p(test.ecdf_p_value)}, chi-square {_p(test.chi2_p_value)})."
            ),
            numbers={
                "quantity": name,
                "tests": tests,
                "replicates": used,
                "L": result.L,
                "shape": test.shape,
                "direction": test.direction,
                "shift_z": test.shift_z,
                "spread_z": test.spread_z,
                "ecdf_p_value": test.ecdf_p_value,
                "chi2_p_value": test.chi2_p_value,
                "simulator": result.simulator,
                **({"approximate_likelihood": approximate_likelihood}
                   if approximate_likelihood and name == LOG_LIKELIHOOD else {}),
            },
            figure=ECDF_FIGURE,
        ))
    finished = used + len(result.failures)
    reasons: dict[str, int] = {}
    for failure in result.failures:
        reasons[_reason_kind(failure["reason"])] = reasons.get(_reason_kind(failure["reason"]), 0) + 1
    share = len(result.failures) / finished if finished else 1.0
    findings.append(Finding(
        assumption=IMPLEMENTATION,
        kind="calibration_failures",
        check="calibration:failures",
        value=share,
        detail=(
            f"{len(result.failures)} of {finished} replicates left out of the ranks"
            + (": " + ", ".join(f"{n} {k}" for k, n in sorted(reasons.items())) if reasons else "")
            + (f"; {result.low_ess} kept an ESS below {result.L}" if result.low_ess else "")
            + "."
        ),
        numbers={
            "failed": len(result.failures),
            "diverged": reasons.get("diverged", 0),
            "finished": finished,
            "sims": result.sims,
            "reasons": reasons,
            "low_ess": result.low_ess,
            "simulator": result.simulator,
        },
        figure=HISTOGRAM_FIGURE,
    ))
    return findings


def _reason_kind(reason: str) -> str:
    if "divergent" in reason:
        return "diverged"
    if reason.startswith("simulation"):
        return "simulation failed"
    if "worker" in reason:
        return "worker lost"
    return "fit failed"


def _p(p) -> str:
    return "p n/a" if p is None else p_equals(p)


@check
def calibration(context: Context) -> list[Finding]:
    """Findings for ``implementation`` when a calibration ran; none otherwise."""
    if context.calibration is None:
        return []
    return calibration_findings(context.calibration, likelihood_approximation(context.design, context.data))
