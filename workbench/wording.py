"""Numbers in the words people write them: for report pages and verdict sentences.

Computes nothing; only spells numbers out.
"""

from __future__ import annotations

import re

import numpy as np

# Numbers are written for people: up to this size in full with thousands
# separators (2,590; 100,000), beyond it and below SMALL as a power of ten.
LARGE = 1e7
SMALL = 1e-4
# A p-value below this is written as "< 0.001": the draws cannot resolve it further.
P_FLOOR = 0.001
SUPERSCRIPT = str.maketrans("-0123456789", "⁻⁰¹²³⁴⁵⁶⁷⁸⁹")


def _finite(x) -> float | None:
    try:
        x = float(x)
    except (TypeError, ValueError):
        return None
    return x if np.isfinite(x) else None


def number(x, digits=3):
    """A number as people write it: ``2,590``, ``0.0217``, ``1.2 × 10⁻⁵``."""
    if x is None or isinstance(x, str):
        return "–" if x is None else x
    value = _finite(x)
    if value is None:
        return "–"
    magnitude = abs(value)
    if value == 0:
        return "0"
    if magnitude >= LARGE or magnitude < SMALL:
        mantissa, exponent = f"{value:.{max(digits - 1, 0)}e}".split("e")
        mantissa = mantissa.rstrip("0").rstrip(".")
        return f"{mantissa} × 10{str(int(exponent)).translate(SUPERSCRIPT)}"
    if magnitude >= 1000:
        return f"{value:,.0f}"
    text = f"{value:.{digits}g}"
    return f"{float(text):,.0f}" if "e" in text else text


def p_value(p):
    """A tail probability: ``< 0.001`` rather than 0, ``> 0.999`` rather than 1."""
    value = _finite(p)
    if value is None:
        return "–"
    if value < P_FLOOR:
        return f"< {P_FLOOR:g}"
    if value > 1 - P_FLOOR:
        return f"> {1 - P_FLOOR:g}"
    return f"{value:.2g}" if value < 0.1 else f"{value:.2f}"


def count(x):
    """A count or an effective number of draws: a whole number with separators."""
    value = _finite(x)
    return "–" if value is None else f"{value:,.0f}"


def p_equals(p) -> str:
    """``p = 0.043`` or ``p < 0.001``, for a sentence."""
    text = p_value(p)
    return f"p {text}" if text[0] in "<>" else f"p = {text}"


_SCIENTIFIC = re.compile(r"(?<![\w.])-?\d+(?:\.\d+)?e[+-]?\d+(?![\w.])")


def readable(text: str) -> str:
    """``text`` with numbers in e-notation spelled as :func:`number` writes them."""
    return _SCIENTIFIC.sub(lambda m: number(float(m.group())), text)


def gain_carriers(contributors: list[dict]) -> str:
    """``distance 1 (52%) and distance 1.5 (31%) carry 83% of the gain.``"""
    if not contributors:
        return ""
    parts = [f"{c['label']} ({c['share']:.0%})" for c in contributors]
    named = parts[0] if len(parts) == 1 else ", ".join(parts[:-1]) + f" and {parts[-1]}"
    total = sum(c["share"] for c in contributors)
    verb = "carries" if len(parts) == 1 else "carry"
    return f"{named} {verb} {total:.0%} of the expanded model's gain in elpd."
