"""Findings -> one verdict per assumption.

This is the only place that turns numbers into judgements. Each finding kind
has a *rule* (registered with :func:`rule` in a module of
:mod:`workbench.rules`) that reads the finding's numbers against named
thresholds and returns a :class:`Judgement`: a level (0 holds, 1 doubtful,
2 broken), one sentence for the report and, when it argues for a problem, the
advice. An assumption's verdict is the worst level among its judgements;
``unchecked`` when it has none.
"""

from __future__ import annotations

import importlib
import pkgutil
from dataclasses import dataclass, field
from typing import Callable

from workbench.findings import GENERIC_ASSUMPTIONS, IMPLEMENTATION, Finding

HOLDS, DOUBTFUL, BROKEN, UNCHECKED = "holds", "doubtful", "broken", "unchecked"
LEVELS = {0: HOLDS, 1: DOUBTFUL, 2: BROKEN}
# Report order: the most urgent first.
ORDER = {BROKEN: 0, DOUBTFUL: 1, UNCHECKED: 2, HOLDS: 3}


@dataclass
class Judgement:
    level: int
    sentence: str
    advice: str = ""
    # How strongly this evidence points at its assumption (used to rank the
    # diagnosis when several assumptions look broken); larger is stronger.
    strength: float = 0.0


@dataclass
class Verdict:
    key: str
    statement: str
    verdict: str
    evidence: list[tuple[Finding, Judgement]] = field(default_factory=list)
    advice: str = ""
    strength: float = 0.0
    # The key of the assumption whose failure explains this one's alarm ('' when none).
    symptom_of: str = ""
    # Other causes that stand beside this one: broken assumptions whose alarms
    # remain under each other's relaxed models (none is a symptom of another).
    confirmed_with: list[str] = field(default_factory=list)

    @property
    def decided_by(self) -> Finding | None:
        """The evidence that set the verdict: at the worst level, the strongest.

        None when every piece of evidence says the assumption holds.
        """
        worst = max((j.level for _, j in self.evidence), default=0)
        if worst == 0:
            return None
        ranked = [(j.strength, -i, f) for i, (f, j) in enumerate(self.evidence) if j.level == worst]
        return max(ranked, key=lambda t: t[:2])[2]

    @property
    def contributors(self) -> list[dict]:
        """Rows carrying the relaxed model's gain, for a broken or doubtful assumption."""
        if self.verdict not in (BROKEN, DOUBTFUL):
            return []
        found = [f.numbers.get("contributors") or [] for f, _ in self.evidence if f.kind == "relaxation"]
        return max(found, key=len, default=[])

    def to_dict(self) -> dict:
        doc = {
            "key": self.key,
            "statement": self.statement,
            "verdict": self.verdict,
            "evidence": [
                {
                    "check": f.check,
                    "value": _num(f.value),
                    "p_value": _num(f.p_value),
                    "detail": f"{f.detail} {j.sentence}".strip(),
                    **_elpd_source(f),
                }
                for f, j in self.evidence
            ],
            "advice": self.advice,
        }
        if self.contributors:
            doc["contributors"] = [dict(c) for c in self.contributors]
        if self.symptom_of:
            doc["symptom_of"] = self.symptom_of
        if self.confirmed_with:
            doc["confirmed_with"] = list(self.confirmed_with)
        return doc


def _elpd_source(f: Finding) -> dict:
    """Where a relaxation's elpd difference came from and why: {} for other evidence."""
    method = f.numbers.get("elpd_method") if f.kind == "relaxation" else None
    if not method:
        return {}
    return {"elpd_method": method,
            "why": "; ".join(w for w in (f.numbers.get("why_not_psis"), f.numbers.get("why_no_refits")) if w)}


def _num(x):
    if x is None:
        return None
    x = float(x)
    return x if x == x and abs(x) != float("inf") else None


_RULES: dict[str, Callable[[Finding], Judgement]] = {}
# Passes over all verdicts of a run, for judgements that weigh one
# assumption's evidence against another's (e.g. symptom versus cause).
_SETTLERS: list[Callable[[list["Verdict"]], None]] = []


def rule(kind: str):
    """Register the rule that judges findings of ``kind``."""

    def register(fn):
        _RULES[kind] = fn
        return fn

    return register


def settle(fn):
    """Register a pass that may revise verdicts in the light of each other."""
    _SETTLERS.append(fn)
    return fn


_rules_loaded = False


def _load_rules() -> None:
    """Import every module of :mod:`workbench.rules` once (one imported directly is not all)."""
    global _rules_loaded
    import workbench.rules as package

    if _rules_loaded:
        return
    for info in pkgutil.iter_modules(package.__path__):
        importlib.import_module(f"{package.__name__}.{info.name}")
    _rules_loaded = True


def judge(finding: Finding) -> Judgement:
    if finding.kind not in _RULES:
        _load_rules()
    try:
        fn = _RULES[finding.kind]
    except KeyError:
        raise KeyError(f"no verdict rule for finding kind {finding.kind!r}") from None
    return fn(finding)


def decide(assumptions: list[tuple[str, str, str]], findings: list[Finding],
           uninformed: dict[str, str] | None = None) -> list[Verdict]:
    """One verdict per assumption, most urgent first.

    ``assumptions`` lists (key, statement, default advice) of the recipe; the
    generic ``priors``, ``computation`` and ``implementation`` are added.
    ``uninformed`` maps an assumption the table cannot inform to the reason:
    it is `unchecked`, whatever its findings.
    """
    uninformed = uninformed or {}
    declared = [(k, s, "") for k, s in GENERIC_ASSUMPTIONS.items()] + list(assumptions)
    # An assumption checked by several statistics is declared once per statistic; judge it once.
    first: dict[str, tuple[str, str, str]] = {}
    for entry in declared:
        first.setdefault(entry[0], entry)
    declared = list(first.values())
    verdicts = []
    for key, statement, default_advice in declared:
        if key in uninformed:
            verdicts.append(Verdict(key, statement, UNCHECKED,
                                    advice=f"Not checked: {uninformed[key]}."))
            continue
        own = [f for f in findings if f.assumption == key]
        judged = [(f, judge(f)) for f in own]
        if not judged:
            verdict = Verdict(key, statement, UNCHECKED)
            if key == IMPLEMENTATION:
                verdict.advice = "Run simulation-based calibration (--sbc N) to check the model code."
            verdicts.append(verdict)
            continue
        worst = max(j.level for _, j in judged)
        # Every piece of advice that applies, the worst level's first (strongest
        # evidence first), then the assumption's own advice, then the milder ones.
        ranked = sorted(((j.level, j.strength, j.advice) for _, j in judged
                         if j.level > 0 and j.advice), key=lambda t: (-t[0], -t[1]))
        advice = [a for level, _, a in ranked if level == worst]
        if worst > 0 and default_advice:
            advice.append(default_advice)
        advice += [a for level, _, a in ranked if level < worst]
        strength = sum(j.strength for _, j in judged if j.level == worst) if worst else 0.0
        verdicts.append(
            Verdict(key, statement, LEVELS[worst], judged, " ".join(dict.fromkeys(advice)), strength)
        )
    _load_rules()
    for settler in _SETTLERS:
        settler(verdicts)
    return rank(verdicts)


def rank(verdicts: list[Verdict]) -> list[Verdict]:
    """Most urgent first; among equals, the strongest evidence first."""
    return sorted(verdicts, key=lambda v: (ORDER[v.verdict], -v.strength))


def headline(verdicts: list[Verdict]) -> str:
    """The result of a run in one sentence: what is wrong, the likely cause, the next step.

    The likely cause is the assumption that others are symptoms of, else the
    most urgent one. With nothing broken or doubtful the sentence names the
    assumptions that no check reached.
    """
    counts = {level: sum(v.verdict == level for v in verdicts) for level in (BROKEN, DOUBTFUL)}
    unchecked = [v.key for v in verdicts if v.verdict == UNCHECKED]
    if not any(counts.values()):
        held = sum(v.verdict == HOLDS for v in verdicts)
        text = f"Nothing is broken or doubtful: {held} of {len(verdicts)} assumptions hold."
        if unchecked:
            text += f" Not checked: {', '.join(unchecked)}."
            advice = [v.advice for v in verdicts if v.verdict == UNCHECKED and v.advice]
            if advice:
                text += f" {advice[0]}"
        return text
    parts = [f"{n} {level}" for level, n in counts.items() if n]
    verb = "is" if counts[BROKEN] == 1 or (not counts[BROKEN] and counts[DOUBTFUL] == 1) else "are"
    found = f"Of {len(verdicts)} assumptions, {parts[0].replace(' ', f' {verb} ', 1)}" \
        + "".join(f" and {p}" for p in parts[1:])
    ranked = rank(verdicts)
    causes = [v.symptom_of for v in ranked if v.symptom_of]
    cause = next((v for v in ranked if causes and v.key == causes[0]), ranked[0])
    if cause.verdict == BROKEN and cause.confirmed_with:
        # Several causes stand: name them all, each with its own symptoms.
        named = [cause] + [v for v in ranked if v.key in cause.confirmed_with]
        others = "others' relaxations" if len(named) > 2 else "other's relaxation"
        text = f"{found}. {_count_word(len(named))} broken assumptions, each confirmed under the {others}: "
        parts = []
        for v in named:
            own = [s.key for s in ranked if s.symptom_of == v.key]
            parts.append(f"{v.key} ({v.statement.rstrip('.')})"
                         + (f", with {', '.join(own)} following from it" if own else ""))
        text += "; ".join(parts) + "."
        if cause.advice:
            text += f" Next step: {cause.advice}"
        return text
    symptoms = [v.key for v in ranked if v.symptom_of == cause.key]
    role = "Likely cause" if cause.verdict == BROKEN else "Most in doubt"
    text = f"{found}. {role}: {cause.key} ({cause.statement.rstrip('.')})"
    if symptoms:
        text += f"; {', '.join(symptoms)} {'follows' if len(symptoms) == 1 else 'follow'} from it"
    text += "."
    if cause.advice:
        text += f" Next step: {cause.advice}"
    return text


def _count_word(n: int) -> str:
    return {2: "Two", 3: "Three", 4: "Four"}.get(n, str(n))
