"""Quantities with SI prefixes and the one parameter validator."""

import math

import pytest
from impactline import Param, ParameterError
from impactline.params import resolve_params
from impactline.units import QuantityError, format_quantity, parse_quantity


@pytest.mark.parametrize(
    ("text", "unit", "expected"),
    [
        ("250 kHz", "Hz", 250e3),
        ("250kHz", "Hz", 250e3),
        ("1 MHz", "Hz", 1e6),
        ("5 pA", "A", 5e-12),
        ("20 us", "s", 20e-6),
        ("20 \u00b5s", "s", 20e-6),
        ("1.5e-3 s", "s", 1.5e-3),
        ("2 min", "s", 120.0),
        ("10 pM", "mol/m^3", 1e-8),  # 1 M = 1000 mol/m^3 (SI brochure, 9th ed., Table 8: litre)
        ("0.89 mPa s", "Pa s", 0.89e-3),
        (3, "Hz", 3.0),
        ("12", "A", 12.0),
        ("-4 nA", "A", -4e-9),
    ],
)
def test_parse_quantity_reads_si_prefixes(text, unit, expected):
    assert math.isclose(parse_quantity(text, unit), expected, rel_tol=1e-15)


@pytest.mark.parametrize(("text", "unit"), [("5 pF", "A"), ("kHz", "Hz"), ("5 xA", "A"), ("5 Hz", ""), (True, "Hz")])
def test_parse_quantity_refuses_wrong_units(text, unit):
    with pytest.raises(QuantityError):
        parse_quantity(text, unit)


def test_wrong_unit_message_suggests_the_right_spelling():
    with pytest.raises(QuantityError, match="'20 Hz'"):
        parse_quantity("20 kA", "Hz")


def test_format_quantity_picks_the_prefix():
    assert format_quantity(4.2e-12, "A") == "4.2 pA"
    assert format_quantity(250e3, "Hz") == "250 kHz"
    assert format_quantity(0.0, "C") == "0 C"


DECLARED = {
    "cutoff": Param(10e3, unit="Hz", low=0, low_inclusive=False, doc="-3 dB frequency"),
    "order": Param(4, kind=int, low=1, high=10, doc="poles"),
    "mode": Param("zero-phase", kind=str, choices=("causal", "zero-phase"), doc="phase"),
    "keep": Param(False, kind=bool, doc="flag"),
}


def test_resolve_fills_defaults_and_converts_units():
    values = resolve_params("filter 'x'", DECLARED, {"cutoff": "20 kHz", "order": 6})
    assert values == {"cutoff": 20e3, "order": 6, "mode": "zero-phase", "keep": False}


@pytest.mark.parametrize(
    ("given", "fragment"),
    [
        ({"cutof": 1}, "did you mean 'cutoff'"),
        ({"order": 11}, "<= 10"),
        ({"order": 2.5}, "integer"),
        ({"cutoff": 0}, "> 0"),
        ({"cutoff": "5 pA"}, "does not have the unit 'Hz'"),
        ({"mode": "zerophase"}, "did you mean 'zero-phase'"),
        ({"keep": "yes"}, "true or false"),
    ],
)
def test_resolve_reports_which_parameter_and_what_is_allowed(given, fragment):
    with pytest.raises(ParameterError) as info:
        resolve_params("filter 'x'", DECLARED, given)
    message = str(info.value)
    assert "filter 'x'" in message and fragment in message
    assert info.value.key == next(iter(given))
