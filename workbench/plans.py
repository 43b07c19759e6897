"""Plan files (TOML) and run manifests: what to run, and what was run.

A plan file names everything a run depends on, so that a reviewer can rerun
it and get the same numbers::

    data = "tables/emergence.csv"       # relative to the plan file
    recipe = "timing-curve"             # or a model file path (relative too)
    seed = 1
    sbc = 0                             # calibration replicates
    relax = true                        # fit the relaxed models (default true)
    [options]
    family = "weibull"
    [priors]
    shape = "lognormal(0.3,0.6)"
    [sampling]                          # optional; defaults of a report
    draws = 1000
    tune = 1000
    chains = 4
    target_accept = 0.8
    [gates]                             # audit only; defaults exist for all
    max_rhat = 1.01
    [waivers]                           # audit only: gate name = "written reason"

A plan for ``compare`` lists designs instead of one recipe::

    data = "tables/emergence.csv"
    designs = ["timing-curve:family=weibull", "timing-curve:family=lognormal"]

Every run also writes a *manifest*: the data's SHA-256, the plan as it was
resolved, the seed, the versions of Python and every scientific dependency,
the platform and the start time.
"""

from __future__ import annotations

import numbers
import platform
import tomllib
from dataclasses import dataclass, field
from datetime import datetime, timezone
from difflib import get_close_matches
from pathlib import Path
from typing import Any

from workbench.errors import OptionError
from workbench.recipe import option_text

# Seeds run from 0 to 2^63 - 1: NumPy's SeedSequence takes any whole number >= 0
# and the run history stores the seed as a signed 64-bit SQLite INTEGER.
MAX_SEED = 2**63 - 1

# Top-level keys a plan may hold; anything else is a typo worth one clear line.
PLAN_KEYS = ("data", "recipe", "designs", "seed", "sbc", "relax", "options", "priors",
             "sampling", "gates", "waivers", "title")
SAMPLING_KEYS = ("draws", "tune", "chains", "prior_draws", "target_accept")
# The sampling settings the command line can set (``--target-accept`` for target_accept).
COMMAND_LINE_SAMPLING = ("draws", "tune", "chains", "target_accept")


@dataclass
class DesignSpec:
    """One design to run: a recipe name or model file, its options and prior overrides."""

    target: str
    options: dict[str, str] = field(default_factory=dict)
    priors: dict[str, str] = field(default_factory=dict)

    def text(self) -> str:
        """The design in command-line form, ``RECIPE[:KEY=VALUE]...[:PARAM~DIST]...``."""
        parts = [self.target] + [f"{k}={v}" for k, v in self.options.items()]
        parts += [f"{k}~{v}" for k, v in self.priors.items()]
        return ":".join(parts)


@dataclass
class Plan:
    """A parsed plan file; paths are already resolved against the plan's folder."""

    path: Path | None
    data: Path | None
    designs: list[DesignSpec]
    seed: int = 1
    sbc: int = 0
    relax: bool = True
    sampling: dict[str, int | float] = field(default_factory=dict)
    gates: dict[str, Any] = field(default_factory=dict)
    waivers: dict[str, Any] = field(default_factory=dict)
    title: str = ""

    @property
    def design(self) -> DesignSpec:
        """The single design of a check or audit plan."""
        if len(self.designs) != 1:
            raise OptionError(f"plan {self._where()}: expected one 'recipe'; found "
                              f"{len(self.designs)} designs (a list of designs is for compare)")
        return self.designs[0]

    def settings(self, base=None):
        """Sampling settings: the plan's ``[sampling]`` over ``base`` (default: a report's)."""
        from dataclasses import replace

        from workbench.engine import Settings

        return replace(base or Settings(), **self.sampling)

    def to_dict(self) -> dict:
        """The plan as resolved, for manifests (paths as text)."""
        return {
            "file": str(self.path) if self.path else None,
            "data": str(self.data) if self.data else None,
            "designs": [d.text() for d in self.designs],
            "seed": self.seed,
            "sbc": self.sbc,
            "relax": self.relax,
            "sampling": dict(self.sampling),
            "gates": dict(self.gates),
            "waivers": dict(self.waivers),
        }

    def _where(self) -> str:
        return repr(str(self.path)) if self.path else "(given in code)"


# --- design specs on the command line ----------------------------------------------------


def parse_design(text: str) -> DesignSpec:
    """Read ``RECIPE_OR_FILE[:KEY=VALUE]...[:PARAM~DIST(ARGS)]...``.

    ``KEY=VALUE`` sets a design option, ``PARAM~DIST(ARGS)`` overrides a prior
    (the form :meth:`workbench.recipe.Design.label` prints, so a label read
    back gives the same design).

    Examples
    --------
    >>> parse_design("timing-curve:family=weibull:eventual=all").options
    {'family': 'weibull', 'eventual': 'all'}
    """
    pieces = [p.strip() for p in str(text).split(":")]
    target, rest = pieces[0], pieces[1:]
    if not target:
        raise OptionError(f"design {text!r}: expected RECIPE_OR_FILE[:KEY=VALUE]...; found no recipe")
    spec = DesignSpec(target)
    for piece in rest:
        key, eq, value = piece.partition("=")
        if eq and key.strip() and "~" not in key:
            _once(spec.options, key.strip(), text, "option", f"{key.strip()}=a,b")
            spec.options[key.strip()] = value.strip()
            continue
        key, tilde, value = piece.partition("~")
        if tilde and key.strip() and value.strip():
            _once(spec.priors, key.strip(), text, "prior", None)
            spec.priors[key.strip()] = value.strip()
            continue
        raise OptionError(f"design {text!r}: expected KEY=VALUE or PARAM~DIST(ARGS) after "
                          f"'{target}'; found {piece!r}")
    return spec


def _once(given: dict, key: str, text: str, what: str, list_form: str | None) -> None:
    """A design sets each option and prior once; a second value would silently win."""
    if key in given:
        hint = f" (a list value takes commas: {list_form})" if list_form else ""
        raise OptionError(f"design {text!r}: expected each {what} once; found '{key}' twice{hint}")


# --- plan files ------------------------------------------------------------------------------


def read_plan(path: str | Path) -> Plan:
    """Read and check a plan file; raise :class:`OptionError` with one line when it is bad.

    ``data`` and a model-file ``recipe`` are relative to the plan's folder.
    """
    path = Path(path)
    where = f"plan '{path}'"
    try:
        raw = tomllib.loads(path.read_text(encoding="utf-8"))
    except FileNotFoundError:
        raise OptionError(f"{where}: expected a TOML plan file; found no such file") from None
    except UnicodeDecodeError:
        raise OptionError(f"{where}: expected UTF-8 text; found undecodable bytes") from None
    except tomllib.TOMLDecodeError as err:
        raise OptionError(f"{where}: not valid TOML ({err})") from None
    return plan_from_dict(raw, path)


def plan_from_dict(raw: dict, path: Path | None = None) -> Plan:
    """Check a plan given as a dict (a parsed file, or built in code)."""
    where = f"plan '{path}'" if path else "plan"
    base = path.parent if path else Path(".")
    for key in raw:
        if key not in PLAN_KEYS:
            close = get_close_matches(key, PLAN_KEYS, n=1)
            hint = f"; did you mean '{close[0]}'?" if close else f" (known: {', '.join(PLAN_KEYS)})"
            raise OptionError(f"{where}: unknown key '{key}'{hint}")
    if "recipe" in raw and "designs" in raw:
        raise OptionError(f"{where}: expected either 'recipe' or 'designs'; found both")
    options = _table(raw, "options", where)
    priors = {k: _text(v, f"{where} [priors] {k}") for k, v in _table(raw, "priors", where).items()}
    if "recipe" in raw:
        target = _text(raw["recipe"], f"{where} recipe")
        if target.endswith(".py"):
            target = str((base / target).resolve()) if not Path(target).is_absolute() else target
        designs = [DesignSpec(target, {k: option_text(v) for k, v in options.items()}, priors)]
    elif "designs" in raw:
        if options or priors:
            raise OptionError(f"{where}: [options] and [priors] go with 'recipe'; with 'designs' "
                              f"put them in each design, e.g. 'timing-curve:family=weibull'")
        designs = [_design_entry(item, base, f"{where} designs[{i}]")
                   for i, item in enumerate(_list(raw, "designs", where))]
    else:
        raise OptionError(f"{where}: expected a 'recipe' (or a list of 'designs'); found neither")
    data = None
    if "data" in raw:
        data_text = _text(raw["data"], f"{where} data")
        data = Path(data_text) if Path(data_text).is_absolute() else (base / data_text)
    sampling = _table(raw, "sampling", where)
    for key, value in sampling.items():
        if key not in SAMPLING_KEYS:
            close = get_close_matches(key, SAMPLING_KEYS, n=1)
            hint = f"; did you mean '{close[0]}'?" if close else ""
            raise OptionError(f"{where}: [sampling] has no key '{key}'{hint}")
        if key == "target_accept":
            _probability(value, f"{where} [sampling] {key}")
        else:
            _whole(value, f"{where} [sampling] {key}", minimum=1)
    return Plan(
        path=path,
        data=data,
        designs=designs,
        seed=check_seed(raw.get("seed", 1), f"{where} seed"),
        sbc=_whole(raw.get("sbc", 0), f"{where} sbc"),
        relax=_flag(raw.get("relax", True), f"{where} relax"),
        sampling=dict(sampling),
        gates=_table(raw, "gates", where),
        waivers=_table(raw, "waivers", where),
        title=_text(raw.get("title", ""), f"{where} title"),
    )


def _design_entry(item, base: Path, where: str) -> DesignSpec:
    if isinstance(item, str):
        spec = parse_design(item)
    elif isinstance(item, dict):
        unknown = sorted(set(item) - {"recipe", "options", "priors"})
        if unknown or "recipe" not in item:
            raise OptionError(f"{where}: expected a table with 'recipe', 'options', 'priors'; "
                              f"found keys {', '.join(sorted(item)) or 'none'}")
        spec = DesignSpec(_text(item["recipe"], where),
                          {k: option_text(v) for k, v in dict(item.get("options", {})).items()},
                          {k: _text(v, where) for k, v in dict(item.get("priors", {})).items()})
    else:
        raise OptionError(f"{where}: expected a design text or table; found {type(item).__name__}")
    if spec.target.endswith(".py") and not Path(spec.target).is_absolute():
        spec.target = str((base / spec.target).resolve())
    return spec


def _table(raw: dict, key: str, where: str) -> dict:
    value = raw.get(key, {})
    if not isinstance(value, dict):
        raise OptionError(f"{where}: expected [{key}] to be a table; found {type(value).__name__}")
    return dict(value)


def _list(raw: dict, key: str, where: str) -> list:
    value = raw.get(key)
    if not isinstance(value, list) or not value:
        raise OptionError(f"{where}: expected '{key}' to be a non-empty list; found {value!r}")
    return value


def _text(value, where: str) -> str:
    if not isinstance(value, str):
        raise OptionError(f"{where}: expected text in quotes; found {value!r}")
    return value


def _whole(value, where: str, minimum: int = 0) -> int:
    if isinstance(value, bool) or not isinstance(value, int) or value < minimum:
        raise OptionError(f"{where}: expected a whole number >= {minimum}; found {value!r}")
    return value


def check_seed(value, where: str = "--seed") -> int:
    """A seed the random streams and the run history both accept (0 to 2^63 - 1)."""
    if isinstance(value, bool) or not isinstance(value, numbers.Integral) or not 0 <= value <= MAX_SEED:
        raise OptionError(f"{where}: expected a whole number from 0 to 2^63 - 1; found {value!r}")
    return int(value)


def _probability(value, where: str) -> float:
    if isinstance(value, bool) or not isinstance(value, (int, float)) or not 0 < value < 1:
        raise OptionError(f"{where}: expected a number above 0 and below 1; found {value!r}")
    return float(value)


def _flag(value, where: str) -> bool:
    if not isinstance(value, bool):
        raise OptionError(f"{where}: expected true or false; found {value!r}")
    return value


# --- manifests ---------------------------------------------------------------------------------


def now() -> str:
    """The current time in UTC, ISO 8601 to the second."""
    return datetime.now(timezone.utc).isoformat(timespec="seconds")


def manifest(*, command: str, data_path, data_sha256: str, seed: int, plan: dict,
             started: str | None = None) -> dict:
    """What a run needs to be reproduced, and what it ran on.

    Parameters
    ----------
    command : str
        The command line (or API call) that started the run.
    data_path, data_sha256 : str
        The table and its SHA-256.
    seed : int
        The run's seed; every random step derives from it.
    plan : dict
        The resolved plan: designs, options, priors, sampling settings and,
        for an audit, gates and waivers.
    started : str, optional
        Start time (UTC, ISO 8601); now when not given.

    Returns
    -------
    dict
        ``command``, ``data``, ``seed``, ``plan``, ``versions`` (Python and
        every scientific dependency), ``platform`` and ``started``.
    """
    from workbench.harness import versions

    return {
        "command": command,
        "data": {"path": str(data_path), "sha256": data_sha256},
        "seed": int(seed),
        "plan": plan,
        "versions": versions(),
        "platform": {"system": platform.platform(), "machine": platform.machine(),
                     "processor": platform.processor() or platform.machine(),
                     "python_implementation": platform.python_implementation()},
        "started": started or now(),
    }


def settings_from(args, plan: Plan | None = None, base=None):
    """Sampling settings: the command line's over the plan's ``[sampling]`` over ``base``.

    ``args`` holds ``draws``, ``tune``, ``chains`` and ``target_accept``
    (None where not given); ``base`` defaults to a report's settings.
    """
    from dataclasses import replace

    from workbench.engine import Settings

    base = base or Settings()
    if plan is not None:
        base = plan.settings(base)
    given = {k: getattr(args, k, None) for k in COMMAND_LINE_SAMPLING}
    settings = replace(base, **{k: v for k, v in given.items() if v is not None})
    if settings.chains < 1 or settings.draws < 10:
        raise OptionError(f"--chains must be >= 1 and --draws >= 10; found {settings.chains} and "
                          f"{settings.draws}")
    return settings
