"""SI-prefixed numbers at the edges: parsing command-line values, formatting for people.

Inside the program every quantity is plain SI (Hz, ohm, H, F, s, m). Only the CLI and the
reports speak in prefixes: ``915M``, ``2.45GHz``, ``902M:928M``, ``3.3 pF``.
"""

from __future__ import annotations

import math
import re

from pipeline.errors import ConfigError

PREFIXES = {
    "f": 1e-15, "p": 1e-12, "n": 1e-9, "u": 1e-6, "µ": 1e-6, "m": 1e-3,
    "": 1.0, "k": 1e3, "K": 1e3, "M": 1e6, "G": 1e9, "T": 1e12,
}
_NUMBER = re.compile(r"^\s*([-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?)\s*([fpnuµmkKMGT]?)\s*([A-Za-zΩ]*)\s*$")


def parse_quantity(text: str, unit: str, *, what: str = "value") -> float:
    """Parse ``'915M'``, ``'915MHz'``, ``'3.3p'``, ``'1.2e-8'`` into SI.

    ``unit`` is the expected unit symbol (``'Hz'``, ``'H'``, ``'F'``, ``'s'``, ``'m'``,
    ``'ohm'``); a trailing unit must match it (case-insensitive). For frequencies a lone
    ``m`` is read as mega, not milli (nobody sweeps at millihertz; ``915m`` means MHz).
    """
    m = _NUMBER.match(str(text))
    if not m:
        raise ConfigError(f"cannot read {what} {text!r} (expected e.g. 915M, 2.45GHz)")
    number, prefix, suffix = m.groups()
    allowed = {unit.lower()} | ({"ohm", "ω"} if unit == "ohm" else set())
    if suffix and suffix.lower() not in allowed:
        raise ConfigError(f"cannot read {what} {text!r}: unit {suffix!r}, expected {unit}")
    if unit == "Hz" and prefix == "m":
        prefix = "M"
    return float(number) * PREFIXES[prefix]


def parse_frequency(text: str) -> float:
    """A frequency in Hz from ``'915M'``, ``'915MHz'``, ``'2.45G'`` or ``'915e6'``."""
    value = parse_quantity(text, "Hz", what="frequency")
    if not value > 0:
        raise ConfigError(f"frequency {text!r} must be positive")
    return value


def parse_band(text: str) -> tuple[float, float]:
    """A band ``'902M:928M'`` as ``(f_lo, f_hi)`` in Hz, with ``f_lo < f_hi``."""
    parts = str(text).split(":")
    if len(parts) != 2:
        raise ConfigError(f"cannot read band {text!r} (expected F1:F2, e.g. 902M:928M)")
    lo, hi = (parse_frequency(p) for p in parts)
    if not lo < hi:
        raise ConfigError(f"band {text!r}: the first frequency must be below the second")
    return lo, hi


def format_si(value: float, unit: str, digits: int = 3) -> str:
    """``format_si(3.3e-12, 'F')`` -> ``'3.3 pF'``; ``digits`` significant figures."""
    if value == 0 or not math.isfinite(value):
        return f"{value:g} {unit}"
    exponent = int(math.floor(math.log10(abs(value)) / 3) * 3)
    exponent = max(-15, min(12, exponent))
    prefix = {-15: "f", -12: "p", -9: "n", -6: "µ", -3: "m", 0: "", 3: "k", 6: "M",
              9: "G", 12: "T"}[exponent]
    scaled = value / 10 ** exponent
    return f"{scaled:.{digits}g} {prefix}{unit}"
