"""Unit helpers of sedtemp._units: unit typos, surface brightness and per-beam units, grouped causes."""

import astropy.units as u
import numpy as np
import pytest

from sedtemp._units import (
    COMMON_UNITS,
    beam_solid_angle,
    did_you_mean,
    flux_density_si,
    group_causes,
    parse_unit,
)
from sedtemp.errors import InputError

JY_SI = 1e-26  # 1 Jy = 1e-26 W m^-2 Hz^-1 (definition of the jansky)


def test_parse_unit_and_typo_suggestions():
    assert parse_unit("mJy") == u.mJy and parse_unit(u.Jy) is u.Jy
    with pytest.raises(InputError, match=r"band b250 flux: 'mjy' is not a unit \(did you mean 'mJy' or 'MJy'\?\)"):
        parse_unit("mjy", name="band b250 flux")
    with pytest.raises(InputError, match=r"'Jy/bem' is not a unit \(did you mean 'Jy/beam'"):
        parse_unit("Jy/bem")
    with pytest.raises(InputError, match=r"'zzzz' is not a unit; write it as astropy spells it"):
        parse_unit("zzzz")


def test_did_you_mean():
    assert did_you_mean("methdo", ["method", "n_T", "n_beta"]) == " (did you mean 'method'?)"
    assert did_you_mean("JY", COMMON_UNITS) == " (did you mean 'Jy'?)"
    assert did_you_mean("qqqqq", ["method"]) == ""


def test_flux_density_units():
    np.testing.assert_allclose(flux_density_si([1.0, 250.0], "mJy"), [1e-3 * JY_SI, 0.25 * JY_SI], rtol=1e-14)
    np.testing.assert_allclose(flux_density_si([1.0], "W m-2 Hz-1"), [1.0], rtol=0)


def test_surface_brightness_needs_and_uses_a_solid_angle():
    omega = 400.0 * u.arcsec**2
    got = flux_density_si([3.0], "MJy/sr", solid_angle=omega)
    # reference: astropy's own conversion of I * Omega to Jy
    ref = (3.0 * u.MJy / u.sr * omega.to(u.sr)).to_value(u.W / u.m**2 / u.Hz)
    np.testing.assert_allclose(got, [ref], rtol=1e-14)
    np.testing.assert_allclose(flux_density_si([3.0], "MJy/sr", solid_angle=400.0), [ref], rtol=1e-14)  # bare arcsec2
    beam = beam_solid_angle(area=omega)
    np.testing.assert_allclose(flux_density_si([3.0], "MJy/sr", beam=beam), [ref], rtol=1e-14)  # default: one beam
    with pytest.raises(InputError, match=r"flux: unit MJy / sr is a surface brightness; give the solid angle"):
        flux_density_si([3.0], "MJy/sr")


def test_per_beam_units_with_a_beam():
    beam = beam_solid_angle(fwhm=18.0 * u.arcsec)
    # a point source: peak in Jy/beam = flux density in Jy (definition of the unit)
    np.testing.assert_allclose(flux_density_si([2.0], "Jy/beam", beam=beam), [2.0 * JY_SI], rtol=1e-12)
    # an aperture of 3 beams: reference astropy's beam_angular_area equivalency, then times the aperture
    aperture = 3 * beam * u.sr
    ref = ((2.0 * u.mJy / u.beam).to(u.Jy / u.sr, u.beam_angular_area(beam * u.sr)) * aperture).to_value(
        u.W / u.m**2 / u.Hz)
    np.testing.assert_allclose(flux_density_si([2.0], "mJy/beam", beam=beam, solid_angle=aperture), [ref],
                               rtol=1e-12)
    with pytest.raises(InputError, match=r"unit Jy / beam is per beam; give the beam \(a FWHM"):
        flux_density_si([2.0], "Jy/beam")
    with pytest.raises(InputError, match=r"unit K is not a flux density, a surface brightness or a per-beam unit"):
        flux_density_si([2.0], "K")


def test_beam_solid_angle():
    # exact analytic solution: a circular Gaussian of unit peak integrates to pi FWHM^2 / (4 ln 2)
    fwhm = (10.0 * u.arcsec).to_value(u.rad)
    assert beam_solid_angle(fwhm=10.0) == pytest.approx(np.pi * fwhm**2 / (4 * np.log(2)), rel=1e-14)
    # and by direct numerical integration of the Gaussian on a fine grid (+-6 sigma, 1e-3 sigma cells)
    sigma = fwhm / np.sqrt(8 * np.log(2))
    x = np.arange(-6, 6, 1e-3) * sigma
    num = np.sum(np.exp(-0.5 * x**2 / sigma**2)) ** 2 * (x[1] - x[0]) ** 2
    assert beam_solid_angle(fwhm=10.0) == pytest.approx(num, rel=1e-9)
    assert beam_solid_angle(area=1.0 * u.sr) == 1.0
    with pytest.raises(InputError, match=r"give exactly one of a FWHM"):
        beam_solid_angle(fwhm=1.0, area=1.0)
    with pytest.raises(InputError, match=r"beam FWHM must be positive, got -1"):
        beam_solid_angle(fwhm=-1.0)


def test_group_causes_one_line_per_cause_with_counts():
    keys = [f"S{i:03d}" for i in range(9)]
    causes = ["unit 'mjy' is not a unit"] * 8 + ["error is negative"]
    assert group_causes(causes, keys, show=3) == [
        "unit 'mjy' is not a unit (8 sources: 'S000', 'S001', 'S002' and 5 more)",
        "error is negative (source 'S008')"]
    assert group_causes(["a", "", "b", "a"]) == ["a (2 times)", "b"]
    assert group_causes([]) == []
