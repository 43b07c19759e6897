"""Prior specifications written as ``DIST(ARGS)``.

``halfnormal(0.05)``, ``lognormal(-3.5,0.3)``, ``beta(2,8)``: a PyMC
distribution name in lower case with positional numeric arguments. The text is
parsed, never evaluated.
"""

from __future__ import annotations

import inspect
import math
import re
from dataclasses import dataclass
from functools import cache

from workbench.errors import OptionError

# Where a prior's draws may fall.
REAL, POSITIVE, UNIT = "real", "positive", "unit"
_SUPPORT_TEXT = {REAL: "the whole real line", POSITIVE: "(0, inf)", UNIT: "(0, 1)"}
# The positional arguments of the priors people write, each with its domain
# ("real" or "positive"), and the support of the draws (PyMC's parametrisation).
SIGNATURES: dict[str, tuple[tuple[tuple[str, str], ...], str]] = {
    "normal": ((("mu", REAL), ("sigma", POSITIVE)), REAL),
    "studentt": ((("nu", POSITIVE), ("mu", REAL), ("sigma", POSITIVE)), REAL),
    "cauchy": ((("alpha", REAL), ("beta", POSITIVE)), REAL),
    "laplace": ((("mu", REAL), ("b", POSITIVE)), REAL),
    "logistic": ((("mu", REAL), ("s", POSITIVE)), REAL),
    "halfnormal": ((("sigma", POSITIVE),), POSITIVE),
    "halfstudentt": ((("nu", POSITIVE), ("sigma", POSITIVE)), POSITIVE),
    "halfcauchy": ((("beta", POSITIVE),), POSITIVE),
    "lognormal": ((("mu", REAL), ("sigma", POSITIVE)), POSITIVE),
    "exponential": ((("lam", POSITIVE),), POSITIVE),
    "gamma": ((("alpha", POSITIVE), ("beta", POSITIVE)), POSITIVE),
    "inversegamma": ((("alpha", POSITIVE), ("beta", POSITIVE)), POSITIVE),
    "weibull": ((("alpha", POSITIVE), ("beta", POSITIVE)), POSITIVE),
    "beta": ((("alpha", POSITIVE), ("beta", POSITIVE)), UNIT),
    "uniform": ((("lower", REAL), ("upper", REAL)), REAL),
}

_SPEC = re.compile(r"^\s*([A-Za-z][A-Za-z0-9]*)\s*\((.*)\)\s*$")
_NUMBER = re.compile(r"^[+-]?(\d+(\.\d*)?|\.\d+)([eE][+-]?\d+)?$|^[+-]?inf$")


@dataclass(frozen=True)
class PriorSpec:
    """A parsed prior: the PyMC class name and its positional arguments."""

    dist: str
    args: tuple[float, ...]

    def __str__(self) -> str:
        return f"{self.dist.lower()}({','.join(_fmt(a) for a in self.args)})"

    def create(self, name: str, **kwargs):
        """Create the random variable inside the current PyMC model."""
        return _distributions()[self.dist.lower()](name, *self.args, **kwargs)

    def distribution(self, **kwargs):
        """An unnamed distribution (for ``pm.draw`` or nesting)."""
        return _distributions()[self.dist.lower()].dist(*self.args, **kwargs)


def _fmt(x: float) -> str:
    return str(int(x)) if float(x).is_integer() else repr(x)


@cache
def _distributions() -> dict:
    """Continuous and discrete PyMC distributions by lower-case name."""
    import pymc as pm

    found = {}
    for name in dir(pm.distributions):
        obj = getattr(pm.distributions, name)
        if inspect.isclass(obj) and issubclass(obj, pm.Distribution) and hasattr(obj, "dist"):
            if obj.__module__.startswith("pymc.distributions") and name[0].isupper():
                found[name.lower()] = obj
    return found


def parse_prior(text: str, where: str = "prior") -> PriorSpec:
    """Parse ``DIST(ARGS)``; raise :class:`OptionError` with what was expected."""
    match = _SPEC.match(text or "")
    if not match:
        raise OptionError(
            f"{where}: expected DIST(ARGS) such as halfnormal(0.05); found {text!r}"
        )
    dist, body = match.group(1).lower(), match.group(2).strip()
    known = _distributions()
    if dist not in known:
        from difflib import get_close_matches

        close = get_close_matches(dist, known, n=1)
        hint = f" (did you mean {close[0]}?)" if close else ""
        raise OptionError(f"{where}: unknown distribution {dist!r}{hint}")
    args = []
    for piece in [p.strip() for p in body.split(",")] if body else []:
        if not _NUMBER.match(piece):
            raise OptionError(f"{where}: arguments of {dist} must be numbers; found {piece!r}")
        value = float(piece)
        if math.isnan(value):
            raise OptionError(f"{where}: arguments of {dist} must be numbers; found {piece!r}")
        args.append(value)
    spec = PriorSpec(dist, tuple(args))
    _check_arguments(spec, text, where)
    try:
        spec.distribution()
    except Exception as err:  # PyMC says why the arguments do not fit
        raise OptionError(f"{where}: {text!r} is not a valid {dist} prior ({err})") from None
    return spec


def parse_override(text: str) -> tuple[str, PriorSpec]:
    """Parse one ``--prior PARAM=DIST(ARGS)`` value."""
    name, sep, spec = (text or "").partition("=")
    if not sep or not name.strip():
        raise OptionError(f"--prior: expected PARAM=DIST(ARGS); found {text!r}")
    return name.strip(), parse_prior(spec, where=f"--prior {name.strip()}")


def _check_arguments(spec: PriorSpec, text: str, where: str) -> None:
    """Argument count and domains of a prior PyMC would accept and then fail on."""
    if spec.dist not in SIGNATURES:
        return
    params, _ = SIGNATURES[spec.dist]
    names = ", ".join(name for name, _ in params)
    example = f"e.g. {spec.dist}({','.join('0' if d == REAL else '1' for _, d in params)})"
    if spec.dist == "uniform":
        example = "e.g. uniform(0,1)"
    if len(spec.args) != len(params):
        raise OptionError(
            f"{where}: {spec.dist} takes {len(params)} argument(s) ({names}); found "
            f"{len(spec.args)} in {text.strip()!r} ({example})")
    for (name, domain), value in zip(params, spec.args):
        if domain == POSITIVE and not (value > 0 and math.isfinite(value)):
            raise OptionError(f"{where}: {name} of {spec.dist} must be a number above 0; found "
                              f"{_fmt(value)} in {text.strip()!r} ({example})")
        if domain == REAL and not math.isfinite(value):
            raise OptionError(f"{where}: {name} of {spec.dist} must be a finite number; found "
                              f"{_fmt(value)} in {text.strip()!r} ({example})")
    if spec.dist == "uniform" and not spec.args[0] < spec.args[1]:
        raise OptionError(f"{where}: uniform(lower, upper) needs lower < upper; found "
                          f"{text.strip()!r}")


def support(spec: PriorSpec) -> tuple[float, float] | None:
    """The interval a prior's draws lie in (None for a distribution not in SIGNATURES)."""
    if spec.dist not in SIGNATURES:
        return None
    if spec.dist == "uniform":
        return spec.args[0], spec.args[1]
    return {REAL: (-math.inf, math.inf), POSITIVE: (0.0, math.inf), UNIT: (0.0, 1.0)}[
        SIGNATURES[spec.dist][1]]


def check_support(override: PriorSpec, default: PriorSpec, parameter: str, where: str) -> None:
    """Refuse an override whose draws leave the parameter's support.

    The parameter's support is that of its default prior (a positive spread,
    a share in (0, 1)): a prior with mass outside it gives draws the model
    cannot use.
    """
    inner, outer = support(override), support(default)
    if inner is None or outer is None or (outer[0] <= inner[0] and inner[1] <= outer[1]):
        return
    kind = next((k for k, v in {REAL: (-math.inf, math.inf), POSITIVE: (0.0, math.inf),
                                UNIT: (0.0, 1.0)}.items() if v == outer), None)
    needs = _SUPPORT_TEXT.get(kind, f"[{_fmt(outer[0])}, {_fmt(outer[1])}]")
    raise OptionError(
        f"{where}: {parameter} lives on {needs}; {override} puts draws outside it "
        f"(expected a prior on {needs}, e.g. {default})")
