"""A first-principles model-checking workbench for PyMC models.

The Python API mirrors the command line::

    import workbench
    result = workbench.check("timing-curve", "emergence.csv", options={"family": "weibull"})
    workbench.compare(["timing-curve:family=weibull", "timing-curve:family=lognormal"], "emergence.csv")
    workbench.audit("plan.toml")
    workbench.calibrate("timing-curve", "emergence.csv", sims=100)

Each returns a result whose ``to_dict()`` equals the JSON file the command
writes and whose ``_repr_html_`` shows the summary in Jupyter. The heavy
scientific libraries load on first use, not on ``import workbench``.
"""

from __future__ import annotations

from importlib import import_module

# The functions share their names with their modules (workbench.compare,
# workbench.audit); importing them here, once, makes the package attribute
# the function for good (a later ``import workbench.compare`` does not
# rebind it). Both modules import only light libraries at load time.
from workbench.audit import AuditResult, audit
from workbench.compare import CompareResult, compare

__all__ = ["check", "compare", "calibrate", "audit"]

# Public name -> module that defines it (imported when first asked for).
_EXPORTS = {
    "check": "workbench.api",
    "calibrate": "workbench.api",
    "CheckResult": "workbench.api",
    "CalibrateResult": "workbench.api",
}


def __getattr__(name: str):
    if name in _EXPORTS:
        value = getattr(import_module(_EXPORTS[name]), name)
        globals()[name] = value
        return value
    raise AttributeError(f"module 'workbench' has no attribute {name!r}")


def __dir__():
    return sorted(list(globals()) + list(_EXPORTS))
