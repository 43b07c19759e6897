"""Checks: each is a function ``(context) -> list[Finding]``.

A check module registers its functions with :func:`check`; the harness runs
every registered check on a :class:`Context`. Checks never write files and
never judge: the verdict step does that.
"""

from __future__ import annotations

import importlib
import pkgutil
from dataclasses import dataclass, field
from typing import Any, Callable

from workbench.findings import Finding

_CHECKS: list[tuple[str, Callable[["Context"], list[Finding]]]] = []


@dataclass
class Context:
    """Everything a check may read about one run.

    design      the bound recipe (or a user model file's design)
    data        the validated dataset
    fit         the main fit (:class:`workbench.engine.Fit`)
    relaxed     fits of the relaxed models, by relaxation parameter name
    calibration the calibration result when ``--sbc`` ran, else None
    revisions   the revisions fitted (:func:`workbench.revisions.revise`), as
                plain records
    refits      exact refits leaving units out (:class:`workbench.kfold.CrossValidation`)
                where PSIS-LOO could not decide a relaxation, else None
    """

    design: Any
    data: Any
    fit: Any
    relaxed: dict[str, Any] = field(default_factory=dict)
    calibration: Any = None
    refits: Any = None
    extras: dict[str, Any] = field(default_factory=dict)
    revisions: list[dict] = field(default_factory=list)


def check(fn):
    """Register a check function (its module name groups it in the report)."""
    _CHECKS.append((fn.__module__.rsplit(".", 1)[-1], fn))
    return fn


def registered() -> list[tuple[str, Callable]]:
    """Every check, after importing each module of this package once."""
    for info in pkgutil.iter_modules(__path__):
        importlib.import_module(f"{__name__}.{info.name}")
    return list(_CHECKS)


def run_all(context: Context) -> list[Finding]:
    findings: list[Finding] = []
    for _, fn in registered():
        findings.extend(fn(context))
    return findings
