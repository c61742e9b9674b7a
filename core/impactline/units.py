"""Quantities with SI prefixes, as users write them in pipeline files.

``parse_quantity("250 kHz", "Hz")`` returns ``250000.0``. Everything inside impactline is plain SI
floats; this module is the one place where text with a unit becomes a number.
"""

from __future__ import annotations

import math
import re

__all__ = ["SI_PREFIXES", "QuantityError", "parse_quantity", "format_quantity"]

#: SI prefixes accepted in quantities. Both "u" and the micro sign are accepted for 1e-6.
SI_PREFIXES: dict[str, float] = {
    "Y": 1e24, "Z": 1e21, "E": 1e18, "P": 1e15, "T": 1e12, "G": 1e9, "M": 1e6, "k": 1e3,
    "": 1.0,
    "d": 1e-1, "c": 1e-2, "m": 1e-3, "u": 1e-6, "\u00b5": 1e-6, "\u03bc": 1e-6, "n": 1e-9,
    "p": 1e-12, "f": 1e-15, "a": 1e-18, "z": 1e-21, "y": 1e-24,
}

# Units whose symbol could be mistaken for a prefix + unit are matched whole first.
_UNIT_ALIASES: dict[str, dict[str, float]] = {
    "s": {"min": 60.0, "h": 3600.0},
    "m": {},
    "mol/m^3": {"M": 1000.0, "mol/L": 1000.0},  # concentrations may be written in molar (mol/L)
    "Pa s": {"P": 0.1},
    "K": {},
    "kg/mol": {"g/mol": 1e-3},
    "kg/m^3": {"g/cm^3": 1e3, "g/mL": 1e3, "g/L": 1.0},
}

_NUMBER = r"[-+]?(?:\d+\.?\d*|\.\d+)(?:[eE][-+]?\d+)?"
_QUANTITY_RE = re.compile(rf"^\s*(?P<num>{_NUMBER})\s*(?P<unit>.*?)\s*$")


class QuantityError(ValueError):
    """A quantity could not be read: wrong unit, no number, or an unknown prefix."""


def parse_quantity(value: object, unit: str | None) -> float:
    """Read a number that may carry an SI-prefixed unit.

    Parameters
    ----------
    value : str, int or float
        ``5e-12``, ``"5 pA"``, ``"20 us"``, ``"250kHz"``. A bare number is taken as already in SI units.
    unit : str or None
        The SI unit the result is expressed in (``"A"``, ``"Hz"``, ``"s"``, ``"C"``, ``"m"``, ``"F"``...).
        ``None`` or ``""`` means dimensionless: only a bare number (or a percentage) is accepted.

    Returns
    -------
    float
        The value in SI units.

    Raises
    ------
    QuantityError
        When the text is not a number followed by the expected unit, with the reason and an example.
    """
    if isinstance(value, bool):
        raise QuantityError(f"expected a number{_unit_hint(unit)}, got a boolean ({value!r})")
    if isinstance(value, (int, float)):
        return float(value)
    if not isinstance(value, str):
        raise QuantityError(f"expected a number{_unit_hint(unit)}, got {type(value).__name__} {value!r}")
    match = _QUANTITY_RE.match(value)
    if match is None:
        raise QuantityError(f"expected a number{_unit_hint(unit)}, got {value!r}")
    number = float(match.group("num"))
    text_unit = match.group("unit")
    if text_unit == "":
        return number
    if not unit:
        if text_unit == "%":
            return number / 100.0
        raise QuantityError(f"{value!r} is dimensionless here; write a bare number such as {number:g}")
    scale = _unit_scale(text_unit, unit)
    if scale is None:
        raise QuantityError(
            f"{value!r} does not have the unit {unit!r}; write for example "
            f"'{number:g} {unit}' or with an SI prefix, '{number:g} m{unit}'"
        )
    # Dividing by the exact inverse keeps "20 us" == 2e-05 instead of 1.9999999999999998e-05.
    return number / round(1.0 / scale) if scale < 1.0 else number * scale


def _unit_scale(text_unit: str, unit: str) -> float | None:
    normalized = text_unit.replace("\u00b7", " ").replace("*", " ")
    aliases = _UNIT_ALIASES.get(unit, {})
    if normalized == unit:
        return 1.0
    if normalized in aliases:
        return aliases[normalized]
    for alias, factor in aliases.items():
        if normalized.endswith(alias) and normalized[: -len(alias)] in SI_PREFIXES:
            return SI_PREFIXES[normalized[: -len(alias)]] * factor
    if normalized.endswith(unit):
        prefix = normalized[: -len(unit)]
        if prefix in SI_PREFIXES:
            return SI_PREFIXES[prefix]
    return None


def _unit_hint(unit: str | None) -> str:
    return f" in {unit}" if unit else ""


_DISPLAY_PREFIXES = [("T", 1e12), ("G", 1e9), ("M", 1e6), ("k", 1e3), ("", 1.0), ("m", 1e-3),
                     ("u", 1e-6), ("n", 1e-9), ("p", 1e-12), ("f", 1e-15), ("a", 1e-18)]


def format_quantity(value: float, unit: str, digits: int = 4) -> str:
    """Format an SI value with the prefix that keeps 1 <= mantissa < 1000 (``4.2e-12, "A"`` -> ``4.2 pA``)."""
    if value is None or not math.isfinite(value):
        return f"{value} {unit}".strip()
    if value == 0:
        return f"0 {unit}".strip()
    magnitude = abs(value)
    for prefix, scale in _DISPLAY_PREFIXES:
        if magnitude >= scale * 0.9995:
            return f"{value / scale:.{digits}g} {prefix}{unit}".strip()
    prefix, scale = _DISPLAY_PREFIXES[-1]
    return f"{value / scale:.{digits}g} {prefix}{unit}".strip()
