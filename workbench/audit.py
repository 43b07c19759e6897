"""Audit a model before sign-off: run the plan's check, then hold it to gates.

A plan file (see :mod:`workbench.plans`) fixes the data, the design, the seed
and the sampling settings; its ``[gates]`` table may tighten or loosen the
default gates below and its ``[waivers]`` table may waive a failed gate with
a written reason, which the report shows beside the failure. The audit
passes when every gate passes or is waived.

Gates and their defaults (each default cites its source):

=======================  =========  ==============================================
gate                     default    passes when
=======================  =========  ==============================================
max_rhat                 1.01       largest rank-normalised split R-hat <= value
min_ess_bulk             400        smallest bulk ESS >= value
min_ess_tail             400        smallest tail ESS >= value
max_divergences          0          divergent transitions <= value
min_bfmi                 0.3        smallest E-BFMI over chains >= value
max_pareto_k_share       0          share of rows with Pareto k > 0.7 <= value
min_calibration_p        0.01       every SBC uniformity p-value >= value (sbc > 0)
implementation_checked   true       the implementation assumption is not unchecked
                                    (simulation-based calibration ran)
verdicts.KEY             not broken assumption KEY's verdict is one of the list
=======================  =========  ==============================================

References
----------
Vehtari, A., Gelman, A., Simpson, D., Carpenter, B. and Bürkner, P.-C.
(2021). Rank-normalization, folding, and localization: an improved R-hat for
assessing convergence of MCMC. Bayesian Analysis 16(2), 667-718.
Betancourt, M. (2016). Diagnosing suboptimal cotangent disintegrations in
Hamiltonian Monte Carlo. arXiv:1604.00695.
Betancourt, M. (2017). A conceptual introduction to Hamiltonian Monte Carlo.
arXiv:1701.02434.
Vehtari, A., Simpson, D., Gelman, A., Yao, Y. and Gabry, J. (2024). Pareto
smoothed importance sampling. JMLR 25(72).
Talts, S., Betancourt, M., Simpson, D., Vehtari, A. and Gelman, A. (2018).
Validating Bayesian inference algorithms with simulation-based calibration.
arXiv:1804.06788.
"""

from __future__ import annotations

import html
import math
from dataclasses import dataclass, field
from difflib import get_close_matches
from pathlib import Path
from typing import Callable

from workbench import writers
from workbench.errors import OptionError
from workbench.plans import Plan, manifest, now, read_plan

SCHEMA = "workbench.audit/1"

# --- default gates ------------------------------------------------------------------------

# Vehtari et al. (2021), sec. 4: use a sample only when R-hat < 1.01.
MAX_RHAT = 1.01
# Vehtari et al. (2021), sec. 4: bulk and tail ESS above 400 (100 per chain
# with four chains) before trusting R-hat and the Monte Carlo error.
MIN_ESS_BULK = 400.0
MIN_ESS_TAIL = 400.0
# Betancourt (2017), sec. 6.2: a divergence means the sampler missed part of
# the posterior; any number of them biases estimates. Common practice: zero.
MAX_DIVERGENCES = 0
# Betancourt (2016): E-BFMI below 0.3 indicates the momentum resampling
# cannot explore the energy distribution efficiently.
MIN_BFMI = 0.3
# Vehtari et al. (2024): Pareto k above 0.7 makes the PSIS estimate of that
# row unreliable; by default no such row is accepted unless waived.
PARETO_K_LIMIT = 0.7
MAX_PARETO_K_SHARE = 0.0
# Uniformity p-value below which a calibrated quantity fails (only when the
# plan asks for sbc > 0). With about five quantities tested, 1% each keeps
# the chance of a false alarm near 5% overall (Bonferroni); common practice.
MIN_CALIBRATION_P = 0.01
# A model signed off should have had its code checked against its story:
# simulation-based calibration (Talts et al. 2018; Modrák et al. 2023) is the
# only check of the implementation, so by default it must have run. A plan
# that cannot afford it lifts the gate with a written waiver.
IMPLEMENTATION_CHECKED = "implementation_checked"
# Verdicts acceptable for every assumption unless [gates.verdicts] says otherwise.
ACCEPTABLE_VERDICTS = ("holds", "doubtful", "unchecked")
VERDICTS = ("holds", "doubtful", "broken", "unchecked")

PASS, FAIL, WAIVED, NOT_RUN = "pass", "fail", "waived", "not run"
# Badge of each status in the report: the shapes of the verdict badges.
# A waived gate has a shape of its own: lifted by a reason, not in doubt.
STATUS_BADGES = {PASS: ("✓", "holds"), FAIL: ("✕", "broken"), WAIVED: ("◇", "waived"),
                 NOT_RUN: ("○", "unchecked")}


@dataclass(frozen=True)
class Gate:
    """A numeric gate: ``value <= threshold`` (``upper``) or ``>=`` (not ``upper``)."""

    name: str
    default: float
    upper: bool
    what: str
    source: str


GATES = (
    Gate("max_rhat", MAX_RHAT, True, "largest R-hat", "Vehtari et al. 2021"),
    Gate("min_ess_bulk", MIN_ESS_BULK, False, "smallest bulk ESS", "Vehtari et al. 2021"),
    Gate("min_ess_tail", MIN_ESS_TAIL, False, "smallest tail ESS", "Vehtari et al. 2021"),
    Gate("max_divergences", MAX_DIVERGENCES, True, "divergent transitions",
         "Betancourt 2017; common practice"),
    Gate("min_bfmi", MIN_BFMI, False, "smallest E-BFMI", "Betancourt 2016"),
    Gate("max_pareto_k_share", MAX_PARETO_K_SHARE, True,
         f"share of rows with Pareto k > {PARETO_K_LIMIT}", "Vehtari et al. 2024"),
    Gate("min_calibration_p", MIN_CALIBRATION_P, False, "smallest calibration p-value",
         "Talts et al. 2018; level: common practice"),
)
GATE_BY_NAME = {g.name: g for g in GATES}
VERDICT_PREFIX = "verdicts."


# --- result -------------------------------------------------------------------------------


@dataclass
class AuditResult:
    """A finished audit: the check it ran, the gate outcomes and where they were written."""

    check: object
    doc: dict
    folder: Path | None = None
    files: dict[str, Path] = field(default_factory=dict)

    def to_dict(self) -> dict:
        return self.doc

    @property
    def passed(self) -> bool:
        return bool(self.doc["passed"])

    @property
    def failed(self) -> list[str]:
        """Names of the gates that failed (not waived)."""
        return [g["name"] for g in self.doc["gates"] if g["status"] == FAIL]

    def gates(self):
        """The gate outcomes as a pandas DataFrame."""
        import pandas as pd

        return pd.DataFrame(self.doc["gates"]).set_index("name")

    def _repr_html_(self) -> str:
        rows = "".join(
            f"<tr><td>{html.escape(g['name'])}</td><td>{html.escape(g['status'])}</td>"
            f"<td>{html.escape(g['evidence'])}</td></tr>" for g in self.doc["gates"])
        head = "PASSED" if self.passed else "FAILED: " + ", ".join(self.failed)
        where = (f"<p>Report: {html.escape(str(self.files['report']))}</p>"
                 if "report" in self.files else "")
        return (f"<p><strong>Audit {html.escape(head)}</strong></p>"
                f"<table><tr><th>gate</th><th>status</th><th>evidence</th></tr>{rows}</table>{where}")


# --- checking the plan's gates and waivers ------------------------------------------------------


def _flatten(table: dict, prefix: str = "") -> dict:
    out = {}
    for key, value in table.items():
        if isinstance(value, dict):
            out.update(_flatten(value, f"{prefix}{key}."))
        else:
            out[f"{prefix}{key}"] = value
    return out


def _unknown(kind: str, name: str, known: list[str]) -> OptionError:
    close = get_close_matches(name, known, n=1, cutoff=0.5)
    hint = f"; did you mean '{close[0]}'?" if close else f" (known: {', '.join(known)})"
    return OptionError(f"plan [{kind}]: unknown gate '{name}'{hint}")


def resolve_gates(given: dict, assumptions: list[str]) -> dict:
    """Thresholds and acceptable verdicts in force: the defaults overridden by the plan.

    Returns ``{gate name: threshold}`` for numeric gates and
    ``{"verdicts.KEY": tuple of verdicts}`` for each assumption.
    """
    known = [g.name for g in GATES] + [IMPLEMENTATION_CHECKED] + [VERDICT_PREFIX + k for k in assumptions]
    gates: dict = {g.name: g.default for g in GATES}
    gates[IMPLEMENTATION_CHECKED] = True
    gates.update({VERDICT_PREFIX + k: ACCEPTABLE_VERDICTS for k in assumptions})
    for name, value in _flatten(given).items():
        if name not in known:
            raise _unknown("gates", name, known)
        if name == IMPLEMENTATION_CHECKED:
            if not isinstance(value, bool):
                raise OptionError(f"plan [gates] {name}: expected true or false; found {value!r}")
            gates[name] = value
        elif name.startswith(VERDICT_PREFIX):
            words = [value] if isinstance(value, str) else value
            if not isinstance(words, list) or not words or any(w not in VERDICTS for w in words):
                raise OptionError(f"plan [gates] {name}: expected a list of verdicts from "
                                  f"{', '.join(VERDICTS)}; found {value!r}")
            gates[name] = tuple(words)
        elif isinstance(value, bool) or not isinstance(value, (int, float)) or not math.isfinite(value):
            raise OptionError(f"plan [gates] {name}: expected a number; found {value!r}")
        else:
            gates[name] = float(value)
    return gates


def resolve_waivers(given: dict, gate_names: list[str]) -> dict[str, str]:
    """``{gate name: reason}``; each waiver must name a gate and give a written reason."""
    waivers = {}
    for name, reason in _flatten(given).items():
        if name not in gate_names:
            raise _unknown("waivers", name, gate_names)
        if not isinstance(reason, str) or not reason.strip():
            raise OptionError(f"plan [waivers] {name}: expected a written reason in quotes; "
                              f"found {reason!r}")
        waivers[name] = reason.strip()
    return waivers


# --- evaluating the gates ---------------------------------------------------------------------


def _fmt(x) -> str:
    if x is None:
        return "not computed"
    return f"{x:.4g}" if isinstance(x, float) else str(x)


def evaluate(summary: dict, pareto_k: list[float] | None, gates: dict, waivers: dict[str, str]) -> list[dict]:
    """One outcome per gate: name, status, threshold, value, evidence, source and waiver."""
    c = summary.get("computation") or {}
    out = []

    def add(name, status, threshold, value, evidence, source):
        waiver = waivers.get(name)
        if status == FAIL and waiver:
            status = WAIVED
        out.append({"name": name, "status": status, "threshold": threshold, "value": value,
                    "evidence": evidence, "source": source, "waiver": waiver})

    measured = {
        "max_rhat": (c.get("max_rhat"), "over the free parameters"),
        "min_ess_bulk": (c.get("min_ess_bulk"), "over the free parameters"),
        "min_ess_tail": (c.get("min_ess_tail"), "over the free parameters"),
        "max_divergences": (c.get("divergences"), "after warm-up, all chains"),
        "min_bfmi": (c.get("min_bfmi"), "lowest chain"),
    }
    for name, (value, where) in measured.items():
        gate = GATE_BY_NAME[name]
        limit = gates[name]
        ok = value is not None and (value <= limit if gate.upper else value >= limit)
        sign = "<=" if gate.upper else ">="
        evidence = f"{gate.what} {_fmt(value)} ({where}); required {sign} {_fmt(limit)}"
        add(name, PASS if ok else FAIL, limit, value, evidence, gate.source)

    gate = GATE_BY_NAME["max_pareto_k_share"]
    limit = gates[gate.name]
    if pareto_k is None:
        add(gate.name, NOT_RUN, limit, None, "PSIS-LOO was not computed", gate.source)
    else:
        bad = [i + 1 for i, k in enumerate(pareto_k) if k is not None and k > PARETO_K_LIMIT]
        share = len(bad) / len(pareto_k) if pareto_k else 0.0
        rows = (": rows " + ", ".join(map(str, bad[:10])) + (" ..." if len(bad) > 10 else "")) if bad else ""
        largest = max((k for k in pareto_k if k is not None), default=float("nan"))
        evidence = (f"{len(bad)} of {len(pareto_k)} rows have Pareto k > {PARETO_K_LIMIT}{rows} "
                    f"(largest k {largest:.2f}); required share <= {_fmt(limit)}")
        add(gate.name, PASS if share <= limit else FAIL, limit, share, evidence, gate.source)

    gate = GATE_BY_NAME["min_calibration_p"]
    limit = gates[gate.name]
    calibration = summary.get("calibration")
    if not calibration:
        add(gate.name, NOT_RUN, limit, None, "no calibration in this plan (sbc = 0)", gate.source)
    else:
        p = {k: v.get("p_value") for k, v in calibration["parameters"].items()}
        low = sorted((v, k) for k, v in p.items() if v is not None)
        value = low[0][0] if low else None
        failing = [k for v, k in low if v < limit]
        evidence = (f"{len(p)} quantities over {calibration.get('completed', calibration['sims'])} "
                    f"replicates; smallest p {_fmt(value)}"
                    + (f" ({low[0][1]})" if low else "")
                    + (f"; below {_fmt(limit)}: {', '.join(failing)}" if failing else ""))
        ok = value is not None and not failing
        add(gate.name, PASS if ok else FAIL, limit, value, evidence, gate.source)

    verdicts = {a["key"]: a for a in summary.get("assumptions", [])}
    source = "Talts et al. 2018; Modrák et al. 2023"
    if not gates.get(IMPLEMENTATION_CHECKED, True):
        add(IMPLEMENTATION_CHECKED, NOT_RUN, False, None, "turned off by the plan's [gates]", source)
    else:
        verdict = (verdicts.get("implementation") or {}).get("verdict", "unchecked")
        if verdict == "unchecked":
            evidence = ("implementation: unchecked; no simulation-based calibration ran "
                        "(set sbc > 0 in the plan)")
        else:
            sims = (calibration or {}).get("completed", (calibration or {}).get("sims"))
            evidence = f"implementation: {verdict}" + (f"; calibration over {sims} replicates" if sims else "")
        add(IMPLEMENTATION_CHECKED, FAIL if verdict == "unchecked" else PASS, True, verdict, evidence, source)

    for name, allowed in gates.items():
        if not name.startswith(VERDICT_PREFIX):
            continue
        key = name[len(VERDICT_PREFIX):]
        a = verdicts.get(key)
        verdict = a["verdict"] if a else "unchecked"
        lead = next((e["detail"] for e in (a or {}).get("evidence", []) if e.get("detail")), "")
        evidence = f"{key}: {verdict}; acceptable: {', '.join(allowed)}" + (f". {lead}" if lead and verdict not in allowed else "")
        add(name, PASS if verdict in allowed else FAIL, list(allowed), verdict, evidence,
            "verdict rules")
    return out


# --- the audit --------------------------------------------------------------------------------


def audit(
    plan: str | Path | Plan,
    *,
    out: str | Path | None = None,
    force: bool = False,
    workers: int | None = None,
    cluster: str | None = None,
    cache: bool | str | Path | None = True,
    history: bool | str | Path | None = True,
    recipe_folders: list[str] | None = None,
    write: bool = True,
    say: Callable[[str], None] = lambda _: None,
    progress: bool = False,
    command: str = "",
) -> AuditResult:
    """Run a plan's check and hold the result to its gates.

    Parameters
    ----------
    plan : path or Plan
        The TOML plan file (data, recipe or model file, seed, sbc, options,
        priors, sampling, gates, waivers).
    out, force
        Output folder and whether it may already hold files.
    workers, cluster
        Processes for relaxed fits and calibration; a Dask scheduler address.
    cache : bool or path, default True
        Reuse and store fits in the fit cache (True: ``reports/.fit-cache``).
    history : bool or path, default True
        Append a row to the run history (True: the default history file).
    write : bool, default True
        Write audit.html, audit.json, the check's report, summary and
        posterior, and notebook.ipynb; False computes only.

    Returns
    -------
    AuditResult
        ``passed`` is True when no gate failed without a waiver.

    Raises
    ------
    OptionError, DataError
        A bad plan (unknown gate, empty waiver reason, ...) or bad data, before any fit.

    References
    ----------
    Vehtari et al. (2021), Betancourt (2016, 2017), Vehtari et al. (2024) and
    Talts et al. (2018): see the module docstring.
    """
    from workbench import api
    from workbench.findings import GENERIC_ASSUMPTIONS

    started = now()
    if not isinstance(plan, Plan):
        plan = read_plan(plan)
    spec = plan.design
    if plan.data is None:
        raise OptionError(f"plan '{plan.path}': expected 'data' (the table to audit on); found none")
    design = api.resolve_design(spec.target, spec.options, spec.priors, recipe_folders)
    api.load_data(design, plan.data)  # bad data stops the audit before any gate is read
    keys = list(dict.fromkeys(list(GENERIC_ASSUMPTIONS) + [a.key for a in design.assumptions]))
    gates = resolve_gates(plan.gates, keys)
    waivers = resolve_waivers(plan.waivers, list(gates))
    settings = plan.settings()
    command = command or f"workbench audit {plan.path}"
    folder = writers.run_folder(str(out) if out else None, f"audit-{design.label()}", force) if write else None
    check = api.check(spec.target, plan.data, options=spec.options, priors=spec.priors, seed=plan.seed,
                      out=folder, force=True, sbc=plan.sbc, workers=workers, cluster=cluster,
                      settings=settings, relax=plan.relax, recipe_folders=recipe_folders, write=write,
                      say=say, progress=progress, command=command, cache=cache, history=False,
                      plan_file=plan.path)
    loo = check.run.extras.get("loo")
    outcomes = evaluate(check.summary, loo["pareto_k"] if loo else None, gates, waivers)
    passed = not any(g["status"] == FAIL for g in outcomes)
    doc = writers.clean({
        "schema": SCHEMA,
        "title": plan.title or f"Audit of {design.label()}",
        "plan": plan.to_dict(),
        "recipe": check.summary["recipe"],
        "design": design.label(),
        "data": dict(check.summary["data"]),
        "seed": plan.seed,
        "passed": passed,
        "failed": [g["name"] for g in outcomes if g["status"] == FAIL],
        "gates": outcomes,
        "waivers": [{"gate": k, "reason": v, "used": any(g["name"] == k and g["status"] == WAIVED
                                                         for g in outcomes)}
                    for k, v in waivers.items()],
        "summary": check.summary,
        "manifest": manifest(command=command, data_path=plan.data,
                             data_sha256=check.summary["data"]["sha256"], seed=plan.seed,
                             plan={**plan.to_dict(), "sampling": check.summary["manifest"]["plan"]["sampling"],
                                   "gates_in_force": {k: list(v) if isinstance(v, tuple) else v
                                                      for k, v in gates.items()}},
                             started=started),
    })
    result = AuditResult(check, doc, folder)
    if write:
        result.files = write_audit(result, command)
        if history:
            from workbench import history as run_history

            run_history.record(api.history_path(history), run_history.check_entry(
                "audit", check.run.design, check.summary, result.files["report"],
                gates=PASS if passed else FAIL))
    return result


def write_audit(result: AuditResult, command: str) -> dict[str, Path]:
    """audit.json, audit.html and the audit's notebook (the check's files are already written)."""
    from workbench import notebook
    from workbench.report import html as report_html

    folder = result.folder
    files = dict(result.check.files)
    files["json"] = writers.write_json(folder / "audit.json", result.doc)
    page = report_html.environment().get_template("audit.html.j2").render(
        doc=result.doc, command=command, status_badges=STATUS_BADGES,
        check_report=Path(result.check.files["report"]).name if result.check.files else None)
    files["report"] = writers.atomic_write(folder / "audit.html", page)
    files["notebook"] = writers.atomic_write(folder / "notebook.ipynb", notebook.for_audit(result.doc))
    return files
