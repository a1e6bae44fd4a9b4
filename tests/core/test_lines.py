"""Tests of the built-in line table (gyrometer.core.lines)."""

from __future__ import annotations

import astropy.units as u
import pytest
from astropy.constants import c

from gyrometer.core.errors import SpectralAxisError
from gyrometer.core.lines import Line, get_line, list_lines


@pytest.mark.parametrize("name, vacuum, air_published", [
    # vacuum: MaNGA DAP (NIST Ritz); air: the same table's air column
    ("Halpha", 6564.608, 6562.80),
    ("Hbeta", 4862.683, 4861.32),
    ("[NII]6583", 6585.27, 6583.45),
    ("[NII]6548", 6549.86, 6548.05),
    ("[OIII]5007", 5008.240, 5006.84),
    # NIST air values (from memory)
    ("[SII]6716", 6718.29, 6716.44),
    ("[SII]6731", 6732.67, 6730.82),
    ("CaT8498", 8500.36, 8498.02),
    ("CaT8542", 8544.44, 8542.09),
    ("CaT8662", 8664.52, 8662.14),
])
def test_optical_lines_match_published_vacuum_and_air(name, vacuum, air_published):
    line = get_line(name)
    assert line.vacuum_angstrom == vacuum
    # the stored air value is derived from vacuum (Morton 2000)
    assert line.air_angstrom == pytest.approx(air_published, abs=0.015)
    assert line.frequency_hz == pytest.approx(
        (vacuum * u.AA).to_value(u.Hz, equivalencies=u.spectral()), rel=1e-14)
    assert line.source


@pytest.mark.parametrize("name, frequency_hz", [
    ("HI", 1420.405751768e6),     # astropy tests (Hellwig et al. 1970)
    ("CO(1-0)", 115.2712018e9),   # CDMS (from memory)
    ("CO(2-1)", 230.538e9),       # CDMS/Lovas (from memory)
    ("CO(3-2)", 345.7959899e9),   # CDMS (from memory)
])
def test_radio_lines_have_rest_frequencies(name, frequency_hz):
    line = get_line(name)
    assert line.frequency_hz == frequency_hz
    assert line.vacuum_angstrom is None and line.air_angstrom is None
    assert line.rest() == frequency_hz * u.Hz


@pytest.mark.parametrize("alias, canonical", [
    ("Halpha", "Halpha"), ("H-alpha", "Halpha"), ("Ha", "Halpha"),
    ("H\u03b1", "Halpha"), ("h_alpha", "Halpha"),
    ("[NII]6583", "[NII]6583"), ("NII 6584", "[NII]6583"),
    ("[N II] 6548", "[NII]6548"), ("[OIII]", "[OIII]5007"),
    ("HI", "HI"), ("21cm", "HI"), ("CO(2-1)", "CO(2-1)"), ("co21", "CO(2-1)"),
    ("CO 1-0", "CO(1-0)"), ("Ca II 8542", "CaT8542"),
])
def test_get_line_accepts_forgiving_names(alias, canonical):
    assert get_line(alias).name == canonical


def test_rest_returns_air_or_vacuum_wavelength():
    line = get_line("Halpha")
    assert line.rest() == 6564.608 * u.AA
    assert line.rest(air=True) == line.air_angstrom * u.AA


def test_unknown_line_lists_the_known_ones():
    with pytest.raises(SpectralAxisError, match="unknown line 'Lyman-omega'.*Halpha"):
        get_line("Lyman-omega")


def test_list_lines_returns_frozen_lines():
    lines = list_lines()
    assert len(lines) == 14 and all(isinstance(x, Line) for x in lines)
    with pytest.raises(AttributeError):
        lines[0].vacuum_angstrom = 1.0
    assert get_line(lines[0]) is lines[0]


def test_optical_frequencies_are_c_over_vacuum_wavelength():
    line = get_line("[OIII]5007")
    assert line.frequency_hz * line.vacuum_angstrom * 1e-10 == pytest.approx(
        c.to_value(u.m / u.s), rel=1e-14)
