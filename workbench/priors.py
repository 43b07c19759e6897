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
