"""Typed stage parameters, declared once as class data and checked by one validator.

A stage declares::

    params = {
        "cutoff": Param(10e3, unit="Hz", low=0, low_inclusive=False, doc="-3 dB frequency"),
        "order": Param(4, kind=int, low=1, high=10, doc="number of poles"),
        "mode": Param("zero-phase", choices=("causal", "zero-phase"), doc="..."),
    }

and that declaration drives pipeline-file validation, ``impactline check``, ``impactline plugins`` and the
generated docs. Every message has one shape: which parameter of which stage, what is allowed, what was given.
"""

from __future__ import annotations

import difflib
import math
from collections.abc import Mapping
from dataclasses import dataclass
from typing import Any

from .units import QuantityError, parse_quantity

__all__ = ["Param", "ParameterError", "resolve_params"]


class ParameterError(ValueError):
    """A stage parameter is unknown, of the wrong type, or out of range.

    Attributes
    ----------
    stage : str
        ``kind:name`` of the stage.
    key : str or None
        Parameter name.
    """

    def __init__(self, stage: str, key: str | None, message: str):
        self.stage = stage
        self.key = key
        self.reason = message
        where = f"parameter {key!r} of {stage}" if key else stage
        super().__init__(f"{where}: {message}")


@dataclass(frozen=True)
class Param:
    """Declaration of one stage parameter.

    Parameters
    ----------
    default : object
        Value used when the pipeline file does not set it. ``None`` means "not set" (the stage then
        looks elsewhere, e.g. a reader's sidecar file).
    kind : type
        ``float``, ``int``, ``bool``, ``str`` or ``list`` (list of str).
    unit : str
        SI unit of a quantity (``"Hz"``, ``"s"``, ``"A"``...); values may be written with SI prefixes.
        Empty for dimensionless numbers.
    low, high : float, optional
        Allowed range. Inclusive unless ``low_inclusive``/``high_inclusive`` is False.
    choices : tuple of str, optional
        Allowed values of a ``str`` parameter.
    doc : str
        One line for listings and docs.
    """

    default: Any
    kind: type = float
    unit: str = ""
    low: float | None = None
    high: float | None = None
    low_inclusive: bool = True
    high_inclusive: bool = True
    choices: tuple[str, ...] | None = None
    doc: str = ""

    def describe_allowed(self) -> str:
        """Human-readable statement of the allowed values."""
        if self.choices:
            return "one of " + ", ".join(repr(c) for c in self.choices)
        if self.kind is bool:
            return "true or false"
        if self.kind is list:
            return "a list of strings"
        if self.kind is str:
            return "a string"
        parts = []
        if self.low is not None:
            parts.append(f"{'>=' if self.low_inclusive else '>'} {self.low:g}")
        if self.high is not None:
            parts.append(f"{'<=' if self.high_inclusive else '<'} {self.high:g}")
        what = "an integer" if self.kind is int else "a number"
        unit = f" in {self.unit}" if self.unit else ""
        return f"{what}{unit}" + (f" ({' and '.join(parts)})" if parts else "")

    def convert(self, stage: str, key: str, value: Any) -> Any:
        """Convert a raw (TOML or Python) value, raising :class:`ParameterError` if it does not fit."""
        if value is None:
            return None
        if self.kind is bool:
            if isinstance(value, bool):
                return value
            raise ParameterError(stage, key, f"expected true or false, got {value!r}")
        if self.kind is str:
            if not isinstance(value, str):
                raise ParameterError(stage, key, f"expected {self.describe_allowed()}, got {value!r}")
            if self.choices and value not in self.choices:
                near = difflib.get_close_matches(value, self.choices, n=1)
                hint = f" (did you mean {near[0]!r}?)" if near else ""
                raise ParameterError(stage, key, f"expected {self.describe_allowed()}, got {value!r}{hint}")
            return value
        if self.kind is list:
            if not isinstance(value, (list, tuple)) or not all(isinstance(v, str) for v in value):
                raise ParameterError(stage, key, f"expected a list of strings, got {value!r}")
            if self.choices:
                bad = [v for v in value if v not in self.choices]
                if bad:
                    raise ParameterError(stage, key, f"{bad!r} not among {', '.join(self.choices)}")
            return list(value)
        try:
            number = parse_quantity(value, self.unit)
        except QuantityError as exc:
            raise ParameterError(stage, key, str(exc)) from None
        if not math.isfinite(number):
            raise ParameterError(stage, key, f"expected a finite number, got {value!r}")
        if self.kind is int:
            if number != int(number):
                raise ParameterError(stage, key, f"expected an integer, got {value!r}")
            number = int(number)
        self._check_range(stage, key, number, value)
        return number

    def _check_range(self, stage: str, key: str, number: float, given: Any) -> None:
        too_low = self.low is not None and (number < self.low or (not self.low_inclusive and number == self.low))
        too_high = self.high is not None and (
            number > self.high or (not self.high_inclusive and number == self.high)
        )
        if too_low or too_high:
            raise ParameterError(stage, key, f"expected {self.describe_allowed()}, got {given!r}")


def resolve_params(stage: str, declared: Mapping[str, Param], given: Mapping[str, Any]) -> dict[str, Any]:
    """Validate ``given`` against ``declared`` and return every parameter's value (defaults filled in).

    Raises
    ------
    ParameterError
        For the first unknown name (with the nearest valid name and the full list) or bad value.
    """
    for key in given:
        if key not in declared:
            near = difflib.get_close_matches(key, list(declared), n=1)
            hint = f"did you mean {near[0]!r}? " if near else ""
            valid = ", ".join(sorted(declared)) or "none"
            raise ParameterError(stage, key, f"unknown parameter; {hint}valid parameters: {valid}")
    resolved = {}
    for key, param in declared.items():
        raw = given[key] if key in given else param.default
        resolved[key] = param.convert(stage, key, raw)
    return resolved
