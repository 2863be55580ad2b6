"""Unit spellings and conversions against the SI definitions.

Sources: SI prefixes from the BIPM SI Brochure (9th edition, 2019), table 7;
1 G = 1e-4 T from the SI Brochure's table of non-SI CGS units (from memory);
e^2/h and h/e^2 from CODATA 2018 via scipy.constants.
"""

import numpy as np
import pytest
from scipy import constants

from fanmap.errors import InputError
from fanmap.units import convert, parse_quantity, parse_unit, to_si


@pytest.mark.parametrize("text, quantity, factor", [
    # voltages (SI prefixes: BIPM SI Brochure table 7)
    ("V", "voltage", 1.0), ("mV", "voltage", 1e-3), ("µV", "voltage", 1e-6),  # micro sign U+00B5
    ("μV", "voltage", 1e-6),  # Greek mu U+03BC
    ("uV", "voltage", 1e-6), ("nV", "voltage", 1e-9), ("kV", "voltage", 1e3), ("volts", "voltage", 1.0),
    # fields; gauss = 1e-4 T (SI Brochure, non-SI units, from memory)
    ("T", "field", 1.0), ("mT", "field", 1e-3), ("G", "field", 1e-4), ("kG", "field", 0.1),
    ("gauss", "field", 1e-4), ("tesla", "field", 1.0),
    # resistances
    ("ohm", "resistance", 1.0), ("Ohm", "resistance", 1.0), ("Ω", "resistance", 1.0),
    ("Ω", "resistance", 1.0),  # ohm sign U+2126
    ("kohm", "resistance", 1e3), ("kOhm", "resistance", 1e3), ("kΩ", "resistance", 1e3),
    ("KOhm", "resistance", 1e3), ("Mohm", "resistance", 1e6), ("MΩ", "resistance", 1e6),
    ("mOhm", "resistance", 1e-3),
    # sheet resistivity
    ("ohm/sq", "sheet_resistance", 1.0), ("Ω/□", "sheet_resistance", 1.0),
    ("kohm/sq", "sheet_resistance", 1e3), ("ohm per square", "sheet_resistance", 1.0),
    # conductances
    ("S", "conductance", 1.0), ("mS", "conductance", 1e-3), ("µS", "conductance", 1e-6),
    ("uS", "conductance", 1e-6), ("1/ohm", "conductance", 1.0),
    # currents
    ("A", "current", 1.0), ("mA", "current", 1e-3), ("µA", "current", 1e-6), ("uA", "current", 1e-6),
    ("nA", "current", 1e-9), ("pA", "current", 1e-12),
    # brackets as written in headers
    ("(kOhm)", "resistance", 1e3), ("[mV]", "voltage", 1e-3),
])
def test_each_spelling(text, quantity, factor):
    unit = parse_unit(text)
    assert unit.quantity == quantity
    assert unit.factor == pytest.approx(factor, rel=1e-12)


def test_conductance_quantum_spellings_use_codata():
    # e^2/h from CODATA 2018 via scipy.constants (3.874 046e-5 S).
    e2h = constants.e**2 / constants.h
    for text in ("e^2/h", "e2/h", "e²/h", "(e^2/h)"):
        unit = parse_unit(text)
        assert unit.quantity == "conductance"
        assert unit.factor == pytest.approx(e2h, rel=1e-12)
    assert parse_unit("2e^2/h").factor == pytest.approx(2 * e2h, rel=1e-12)
    # h/e^2 = R_K = 25 812.807 45 ohm (CODATA 2018).
    assert parse_unit("h/e^2").factor == pytest.approx(25812.80745, abs=1e-4)
    assert parse_unit("h/e^2").quantity == "resistance"


@pytest.mark.parametrize("text", ["furlong", "t", "s", "KV", "Vg", "ohmm", "e^3/h"])
def test_unknown_spellings_raise_input_error(text):
    with pytest.raises(InputError, match="not recognised"):
        parse_unit(text)


def test_empty_unit_is_an_error():
    with pytest.raises(InputError):
        parse_unit("  ")


def test_to_si_checks_the_quantity():
    assert to_si([1.0, 2.0], "mV").tolist() == pytest.approx([1e-3, 2e-3])
    with pytest.raises(InputError, match="magnetic field"):
        to_si(1.0, "mV", expect="field", where="column 'B'")


def test_convert_between_units():
    # 1 T = 10 kG (definition of the gauss).
    assert float(convert(1.0, "T", "kG")) == pytest.approx(10.0)
    assert float(convert(25.0, "kohm", "ohm")) == pytest.approx(25000.0)
    with pytest.raises(InputError, match="cannot convert"):
        convert(1.0, "T", "V")


def test_parse_quantity_with_and_without_units():
    assert parse_quantity("10 nA", "current") == pytest.approx(1e-8)
    assert parse_quantity("10nA", "current") == pytest.approx(1e-8)
    assert parse_quantity("2.5e-7", "current") == pytest.approx(2.5e-7)
    assert parse_quantity("9 T", "field") == pytest.approx(9.0)
    assert parse_quantity("500", "field", default_unit="mT") == pytest.approx(0.5)
    with pytest.raises(InputError):
        parse_quantity("ten nA", "current")
    with pytest.raises(InputError, match="a current"):
        parse_quantity("10 mV", "current")
    assert np.isfinite(parse_quantity(np.float64(3.0), "field"))
