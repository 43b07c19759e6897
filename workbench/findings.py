"""Findings: what a check measured, as numbers plus a neutral sentence.

A check returns a list of :class:`Finding`. It does not judge: the verdict
step (:mod:`workbench.verdicts`) turns findings into ``holds``, ``doubtful``,
``broken`` or ``unchecked`` with thresholds kept there.
"""

from __future__ import annotations

from dataclasses import asdict, dataclass, field
from typing import Any

# The assumptions every run has, whatever the recipe.
PRIORS = "priors"
COMPUTATION = "computation"
IMPLEMENTATION = "implementation"
GENERIC_ASSUMPTIONS = {
    PRIORS: "The priors are compatible with the data.",
    COMPUTATION: "The sampler explored the posterior faithfully.",
    IMPLEMENTATION: "The model as coded matches its generative story.",
}


@dataclass
class Finding:
    """One measurement bearing on one assumption.

    kind
        Which rule of the verdict step reads it (``ppc``, ``relaxation``,
        ``divergences``, ``rhat``, ``ess``, ``bfmi``, ``treedepth``,
        ``prior_coverage``, ``prior_sensitivity``, ``calibration``, ...).
    check
        A stable name for the evidence line, e.g. ``ppc:residual_trend``.
    value, p_value
        The headline number and, when there is one, its p-value.
    detail
        What was measured, in one neutral sentence.
    numbers
        Further numbers the verdict rule or the report needs.
    figure
        Name of a figure in the report that shows it, if any.
    """

    assumption: str
    kind: str
    check: str
    value: float | None
    p_value: float | None = None
    detail: str = ""
    numbers: dict[str, Any] = field(default_factory=dict)
    figure: str | None = None

    def to_dict(self) -> dict:
        return asdict(self)
