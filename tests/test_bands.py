"""Bands and band sets: quoted fluxes, colour corrections, weight vectors.

References used below:
* exact analytic results (reference spectrum -> K = 1 by definition; power
  law through a top-hat -> closed-form integrals of x^p);
* scipy.integrate.quad of the defining integrals for a realistic curve;
* the trapezoid-rule error bound |E| <= sum_i h_i^3 / 12 max|f''| (standard
  numerical analysis), which sets every quadrature tolerance here.
"""

import astropy.units as u
import numpy as np
import pytest
from astropy.table import Table
from scipy.integrate import quad

from sedtemp.bands import _DEFAULT_TOPHAT_NODES as NT
from sedtemp.bands import Band, BandSet
from sedtemp.errors import InputError
from sedtemp.planck import C_LIGHT, _planck_nu_si

# ---------------------------------------------------------------------------
# helpers
# ---------------------------------------------------------------------------

LAM_LO, LAM_HI, LAM_MID = 200.0, 300.0, 250.0  # um, invented bump band


def _bump_lam(lam_um):
    """Invented, smooth, asymmetric response on 200-300 um (zero at both ends, C^2)."""
    x = (np.asarray(lam_um, float) - LAM_MID) / (0.5 * (LAM_HI - LAM_LO))
    return np.where(np.abs(x) < 1, (1 - x**2) ** 3 * (1 + 0.3 * x), 0.0)


def _bump_nu(nu_hz):
    return _bump_lam(C_LIGHT / np.asarray(nu_hz, float) * 1e6)


def _bump_band(n_nodes=401, **kw):
    lam = np.linspace(LAM_LO, LAM_HI, n_nodes)
    return Band("bump250", lam * u.um, _bump_lam(lam), **kw)


def _mbb(t_k, beta, nu0_hz=1e12):
    """Modified blackbody (nu/nu0)^beta B_nu(T); broadcasts t_k, beta over a last nu axis."""
    t = np.asarray(t_k, float)[..., None]
    b = np.asarray(beta, float)[..., None]
    return lambda nu: (np.asarray(nu) / nu0_hz) ** b * _planck_nu_si(nu, t)


def _trapezoid_bound(f, nodes, n_fine=16):
    """Trapezoid-rule error bound sum_i h_i^3 / 12 max_i|f''| on the sorted ``nodes``.

    max|f''| on each interval is estimated from second differences on
    n_fine sub-steps (accurate to O((h/n_fine)^2), far below the bound itself).
    """
    h = np.diff(nodes)
    x = nodes[:-1, None] + h[:, None] * np.linspace(0.0, 1.0, n_fine + 1)
    y = f(x.ravel()).reshape(x.shape)
    d2 = (y[:, 2:] - 2 * y[:, 1:-1] + y[:, :-2]) / (h[:, None] / n_fine) ** 2
    return float(np.sum(h**3 / 12 * np.max(np.abs(d2), axis=1)))


def _power_integral(p, lo, hi):
    """Exact int_lo^hi x^p dx."""
    return np.log(hi / lo) if p == -1 else (hi ** (p + 1) - lo ** (p + 1)) / (p + 1)


# ---------------------------------------------------------------------------
# physics checks
# ---------------------------------------------------------------------------


@pytest.mark.parametrize("detector", ["energy", "photon"])
@pytest.mark.parametrize("reference, alpha", [("nu_fnu", -1.0), ("fnu", 0.0), (1.7, 1.7), (-2.5, -2.5)])
def test_reference_spectrum_has_unit_color_correction(detector, reference, alpha):
    # Exact by definition: F = int S R' / int (nu/nu_ref)^alpha R', so a source
    # with S = C (nu/nu_ref)^alpha quotes F = C = S(nu_ref). Numerator and
    # denominator use the same quadrature, so only float rounding remains (1e-13).
    band = _bump_band(detector=detector, reference=reference, reference_wavelength=240 * u.um)
    bs = BandSet([band, Band.tophat("th100", 100 * u.um, 0.4, detector=detector, reference=reference)])
    def spec(nu):
        return 3.0 * (nu / bs.nu_ref_hz[:, None]) ** alpha
    k_band = band.color_correction(lambda nu: 3.0 * (nu / band.nu_ref_hz) ** alpha)
    np.testing.assert_allclose(k_band, 1.0, rtol=1e-13)
    for i, _b in enumerate(bs):
        k = bs.color_correction(lambda nu, i=i: spec(nu)[i])[i]
        np.testing.assert_allclose(k, 1.0, rtol=1e-13)


def test_monochromatic_band_returns_model_value_exactly():
    # Exact by construction: a single grid node with weight 1, zeros elsewhere.
    mono = Band.monochromatic("m850", 850 * u.um)
    bs = BandSet([Band.tophat("b850", 850.0, 0.3), mono, _bump_band()])
    t = np.array([[8.0], [15.0], [40.0]])
    s_grid = _mbb(t[:, 0], 1.8)(bs.nu_grid_hz)
    got = bs.band_fluxes(s_grid)[:, bs.index("m850")]
    expected = _mbb(t[:, 0], 1.8)(np.array([C_LIGHT / 850e-6]))[:, 0]
    assert mono.nu_ref_hz == C_LIGHT / 850e-6
    np.testing.assert_array_equal(got, expected)
    np.testing.assert_array_equal(mono.color_correction(_mbb(t[:, 0], 1.8)), 1.0)
    assert mono.is_monochromatic and mono.detector is None and mono.reference is None


@pytest.mark.parametrize("detector, p", [("energy", 0), ("photon", -1)])
@pytest.mark.parametrize("reference, alpha", [("nu_fnu", -1.0), ("fnu", 0.0), (2.0, 2.0)])
@pytest.mark.parametrize("a", [-2.0, 0.0, 2.0, 3.5])
def test_tophat_powerlaw_color_correction_closed_form(detector, p, reference, alpha, a):
    # Exact analytic: with x = nu / nu_c and S = x^a (so S(nu_c) = 1), the
    # top-hat on [1 - w/2, 1 + w/2] gives
    #   K = int x^(a+p) dx / int x^(alpha+p) dx   (p = 0 energy, -1 photon).
    w, n = 0.35, 101
    band = Band.tophat("th", 160 * u.um, w, detector=detector, reference=reference, n_nodes=n)
    nu_c = band.nu_ref_hz
    lo, hi = 1 - w / 2, 1 + w / 2
    num, den = _power_integral(a + p, lo, hi), _power_integral(alpha + p, lo, hi)
    k_exact = num / den
    k = band.color_correction(lambda nu: (nu / nu_c) ** a)
    # Tolerance: trapezoid bound on each integral, relative errors add in a ratio.
    x = np.linspace(lo, hi, n)
    tol = (_trapezoid_bound(lambda y: y ** (a + p), x) / abs(num)
           + _trapezoid_bound(lambda y: y ** (alpha + p), x) / abs(den))
    assert abs(k / k_exact - 1) <= 1.01 * tol + 1e-14
    assert tol < 5e-5  # the check is sharp: 101 nodes over a 35 % width
    assert nu_c == pytest.approx(C_LIGHT / 160e-6, rel=1e-15)  # reference = centre


@pytest.mark.parametrize("detector, p", [("energy", 0), ("photon", -1)])
@pytest.mark.parametrize("reference, alpha", [("nu_fnu", -1.0), ("fnu", 0.0)])
@pytest.mark.parametrize("t_k, beta", [(12.0, 2.0), (35.0, 1.5)])
def test_broad_band_flux_matches_scipy_quad(detector, p, reference, alpha, t_k, beta):
    # Reference library: scipy.integrate.quad of the defining integrals
    #   F = int S R nu^p dnu / int (nu/nu_ref)^alpha R nu^p dnu
    # with R the analytic bump (the sampled curve's underlying function).
    band = _bump_band(detector=detector, reference=reference, reference_wavelength=LAM_MID * u.um)
    bs = BandSet([band, Band.monochromatic("m500", 500.0)])
    spec = _mbb(t_k, beta)
    flux = bs.band_fluxes(spec(bs.nu_grid_hz))[0]

    nu_lo, nu_hi, nu_ref = C_LIGHT / (LAM_HI * 1e-6), C_LIGHT / (LAM_LO * 1e-6), band.nu_ref_hz
    def f_num(nu):
        return spec(np.atleast_1d(nu))[0] * _bump_nu(nu) * nu**p
    def f_den(nu):
        return (nu / nu_ref) ** alpha * _bump_nu(nu) * nu**p
    kw = dict(epsabs=0.0, epsrel=1e-12, limit=200)
    num, den = quad(f_num, nu_lo, nu_hi, **kw)[0], quad(f_den, nu_lo, nu_hi, **kw)[0]
    ref = num / den
    # Tolerance from node spacing: the trapezoid bound on numerator plus
    # denominator (401 nodes 0.25 um apart, h_nu / nu ~ 1e-3) is ~3e-5 and must
    # beat the 1e-4 goal; the observed error is ~1e-8 (the bound is loose).
    tol = (_trapezoid_bound(f_num, band.nu_hz) / num + _trapezoid_bound(f_den, band.nu_hz) / den)
    assert tol < 1e-4
    assert abs(flux / ref - 1) <= tol


@pytest.mark.parametrize("detector", ["energy", "photon"])
def test_default_reference_frequency_is_response_weighted_mean(detector):
    # Exact analytic for a flat response on [lo, hi]:
    #   energy: int nu dnu / int dnu = (lo + hi) / 2 (trapezoid exact for linear);
    #   photon: int dnu / int dnu / nu = (hi - lo) / ln(hi / lo) (logarithmic mean).
    lo, hi = 1.0e12, 1.6e12
    nu = np.linspace(lo, hi, 201)
    band = Band("flat", nu * u.Hz, np.ones_like(nu), detector=detector)
    if detector == "energy":
        np.testing.assert_allclose(band.nu_ref_hz, 0.5 * (lo + hi), rtol=1e-14)
    else:
        exact = (hi - lo) / np.log(hi / lo)
        tol = _trapezoid_bound(lambda x: 1 / x, nu) / np.log(hi / lo)
        assert abs(band.nu_ref_hz / exact - 1) <= 1.01 * tol
    assert band.reference_wavelength.unit == u.um
    np.testing.assert_allclose(band.reference_wavelength.value, C_LIGHT / band.nu_ref_hz * 1e6, rtol=1e-15)


def test_photon_and_energy_detectors_differ_for_steep_spectrum():
    # Exact analytic (top-hat, S = x^3, nu_fnu reference): the two detectors
    # weight the band differently, so K differs by the closed-form ratio.
    w = 0.5
    lo, hi = 1 - w / 2, 1 + w / 2
    k = {}
    for det, p in (("energy", 0), ("photon", -1)):
        b = Band.tophat("th", 70.0, w, detector=det, n_nodes=2001)
        k[det] = b.color_correction(lambda nu, b=b: (nu / b.nu_ref_hz) ** 3)
        exact = _power_integral(3 + p, lo, hi) / _power_integral(-1 + p, lo, hi)
        np.testing.assert_allclose(k[det], exact, rtol=1e-6)  # trapezoid, h = 2.5e-4: error ~1e-7
    assert k["energy"] > k["photon"] * 1.01


# ---------------------------------------------------------------------------
# weight vectors and vectorisation
# ---------------------------------------------------------------------------


def test_bandset_grid_and_weights_structure():
    b1 = Band.tophat("a", 100.0, 0.3)
    b2 = Band.tophat("b", 100.0, 0.3, detector="photon")  # same nodes as a
    b3 = _bump_band(n_nodes=51)
    b4 = Band.monochromatic("m", 1100 * u.um)
    bs = BandSet([b1, b2, b3, b4])
    g = bs.nu_grid_hz
    assert np.all(np.diff(g) > 0)
    assert g.size == NT + 51 + 1  # shared top-hat nodes merged
    assert bs.weights.shape == (4, g.size)
    for i, b in enumerate(bs):
        idx = np.searchsorted(g, b.nu_hz)
        np.testing.assert_array_equal(g[idx], b.nu_hz)
        np.testing.assert_array_equal(bs.weights[i, idx], b.weights)
        assert np.count_nonzero(bs.weights[i]) == np.count_nonzero(b.weights)
    assert bs.weights[3, np.searchsorted(g, b4.nu_ref_hz)] == 1.0
    np.testing.assert_array_equal(bs.nu_ref_hz, [b.nu_ref_hz for b in (b1, b2, b3, b4)])
    assert not bs.weights.flags.writeable and not b1.nu_hz.flags.writeable


def test_many_models_at_once_equal_one_at_a_time():
    # Exact behaviour: one matrix product over (n_T, n_beta, n_grid) equals the
    # per-model dot products to float rounding (summation order, 1e-12).
    bs = BandSet([Band.tophat("b70", 70.0, 0.4), _bump_band(), Band.monochromatic("m1200", 1200.0),
                  Band.tophat("b500", 500.0, 0.3, detector="photon", reference="fnu")])
    t = np.array([8.0, 15.0, 25.0, 60.0])[:, None] * np.ones((1, 3))
    beta = np.array([1.0, 1.7, 2.2])[None, :] * np.ones((4, 1))
    many = bs.band_fluxes(_mbb(t, beta)(bs.nu_grid_hz))
    assert many.shape == (4, 3, 4)
    k_many = bs.color_correction(_mbb(t, beta))
    assert k_many.shape == (4, 3, 4)
    for i in range(4):
        for j in range(3):
            one = bs.band_fluxes(_mbb(t[i, j], beta[i, j])(bs.nu_grid_hz))
            np.testing.assert_allclose(many[i, j], one, rtol=1e-12)
            for m, band in enumerate(bs):
                k_one = band.color_correction(_mbb(t[i, j], beta[i, j]))
                np.testing.assert_allclose(k_many[i, j, m], k_one, rtol=1e-12)
    # K * S(nu_ref) reproduces the quoted flux (definition of K).
    s_ref = _mbb(t, beta)(np.array(bs.nu_ref_hz))
    np.testing.assert_allclose(k_many * s_ref, many, rtol=1e-12)


def test_band_fluxes_keeps_quantity_unit():
    bs = BandSet([Band.tophat("b", 250.0, 0.3)])
    s = np.full(bs.nu_grid_hz.size, 2.0) * u.mJy
    out = bs.band_fluxes(s)
    assert out.unit == u.mJy
    # Exact: a flat spectrum in a top-hat quoted for nu F_nu = const gives
    # F = int dnu / int (nu_c/nu) dnu * 2 = 2 (hi - lo) / (nu_c ln(hi/lo)).
    lo, hi = 1 - 0.15, 1 + 0.15
    tol = _trapezoid_bound(lambda x: 1 / x, np.linspace(lo, hi, NT)) / np.log(hi / lo)
    assert abs(out.value[0] / (2 * (hi - lo) / np.log(hi / lo)) - 1) <= 1.01 * tol


def test_bandset_container_protocol():
    a, b, c = Band.tophat("a", 100.0, 0.3), Band.tophat("b", 250.0, 0.3), Band.monochromatic("c", 850.0)
    bs = BandSet([a, b, c])
    assert bs.names == ("a", "b", "c") and len(bs) == 3
    assert list(bs) == [a, b, c]
    assert bs["b"] is b and bs[0] is a and bs[-1] is c
    assert bs.index("c") == 2 and "a" in bs and "z" not in bs
    sub = bs.subset(["c", "a"])
    assert sub.names == ("c", "a")
    np.testing.assert_array_equal(sub.weights[1, np.searchsorted(sub.nu_grid_hz, a.nu_hz)], a.weights)
    assert bs.subset("b").names == ("b",)
    assert repr(bs) == f"BandSet(['a', 'b', 'c'], n_grid={2 * NT + 1})"
    assert repr(c) == "Band('c', monochromatic at 850 um)"
    assert repr(a) == f"Band('a', {NT} nodes, nu_ref at 100 um, detector='energy', reference='nu_fnu')"


def test_bare_numbers_are_micrometres():
    # Exact behaviour: bare abscissa values are wavelengths in um.
    lam = np.linspace(200.0, 300.0, 11)
    b_bare = Band("x", lam, _bump_lam(lam) + 0.01, reference_wavelength=250.0)
    b_q = Band("x", lam * u.um, _bump_lam(lam) + 0.01, reference_wavelength=0.25 * u.mm)
    np.testing.assert_allclose(b_bare.nu_hz, b_q.nu_hz, rtol=1e-15)
    np.testing.assert_allclose(b_bare.weights, b_q.weights, rtol=1e-13)
    assert b_bare.nu_ref_hz == pytest.approx(C_LIGHT / 250e-6, rel=1e-15)
    assert np.all(np.diff(b_bare.nu_hz) > 0)  # sorted by frequency


# ---------------------------------------------------------------------------
# files
# ---------------------------------------------------------------------------


def test_from_ecsv_wavelength_and_frequency(tmp_path):
    lam = np.linspace(LAM_LO, LAM_HI, 121)
    resp = _bump_lam(lam)
    Table({"wavelength": lam * u.um, "response": resp}).write(tmp_path / "w.ecsv")
    nu_ghz = C_LIGHT / (lam * 1e-6) / 1e9
    Table({"frequency": nu_ghz * u.GHz, "response": resp}).write(tmp_path / "f.ecsv")
    # ECSV written to a non-.ecsv name needs an explicit format.
    Table({"wavelength": lam * u.um, "response": resp}).write(tmp_path / "w.dat", format="ascii.ecsv")

    ref = Band("b", lam * u.um, resp, detector="photon", reference_wavelength=250 * u.um)
    kw = dict(detector="photon", reference_wavelength=250 * u.um)
    bw = Band.from_file("b", tmp_path / "w.ecsv", **kw)
    bf = Band.from_file("b", str(tmp_path / "f.ecsv"), **kw)
    bd = Band.from_file("b", tmp_path / "w.dat", format="ascii.ecsv", **kw)
    # ECSV stores float64 at full precision: the wavelength file round-trips exactly.
    np.testing.assert_array_equal(bw.nu_hz, ref.nu_hz)
    np.testing.assert_array_equal(bw.weights, ref.weights)
    np.testing.assert_array_equal(bd.weights, ref.weights)
    # The frequency file differs only by the c / lambda conversion rounding.
    np.testing.assert_allclose(bf.nu_hz, ref.nu_hz, rtol=1e-14)
    spec = _mbb(20.0, 1.8)
    np.testing.assert_allclose(bf.color_correction(spec), ref.color_correction(spec), rtol=1e-12)
    assert bw.detector == "photon" and bw.name == "b"


def test_from_file_dimensionless_percent_response(tmp_path):
    # Exact behaviour: a percent response is rescaled; the normalisation cancels in F.
    lam = np.linspace(LAM_LO, LAM_HI, 41)
    Table({"wl": lam * u.um, "r": 100 * _bump_lam(lam) * u.percent}).write(tmp_path / "p.ecsv")
    b = Band.from_file("p", tmp_path / "p.ecsv")
    np.testing.assert_allclose(b.response, _bump_lam(lam)[::-1], rtol=1e-14, atol=1e-300)


# ---------------------------------------------------------------------------
# error messages
# ---------------------------------------------------------------------------

_LAM = np.array([200.0, 250.0, 300.0])
_R = np.array([0.2, 1.0, 0.3])


@pytest.mark.parametrize(
    "kwargs, match",
    [
        (dict(name=""), "band name must be a non-empty string, got ''"),
        (dict(detector="bolo"), r"band 'b': unknown detector 'bolo'; use one of \['energy', 'photon'\]"),
        (dict(reference="flat"), r"band 'b': unknown reference spectrum 'flat'; use one of \['fnu', 'nu_fnu'\]"),
        (dict(reference=np.nan), r"band 'b': reference must be one of .* or a finite float alpha"),
        (dict(reference=True), r"band 'b': reference must be one of .* got True"),
        (dict(x=_LAM * u.kg), r"band 'b': abscissa: unit kg is neither a frequency nor a wavelength"),
        (dict(r=_R * u.Jy), "band 'b': response must be dimensionless, got unit Jy"),
        (dict(r=["a", "b", "c"]), "band 'b': cannot read the response as numbers"),
        (dict(r=_R[:2]), r"band 'b': .* same length, got shapes \(3,\) and \(2,\)"),
        (dict(x=[250.0], r=[1.0]), r"band 'b': a response curve needs at least 2 nodes, got 1; use Band.monochromatic"),
        (dict(r=[0.2, np.nan, 0.3]), r"band 'b': 1 response value\(s\) are not finite; remove or fill them"),
        (dict(x=[200.0, np.inf, 300.0]), r"band 'b': 1 abscissa value\(s\) are not positive finite"),
        (dict(x=[0.0, np.nan, 300.0]), r"band 'b': 2 abscissa value\(s\) are not positive finite"),
        (dict(x=[-200.0, 250.0, 300.0]), r"band 'b': 1 abscissa value\(s\) are not positive finite "
                                         "wavelengths/frequencies"),
        (dict(r=[0.2, -0.1, 0.3]), r"band 'b': response is negative at 1 node\(s\) \(minimum -0.1\); clip it to zero"),
        (dict(r=[0.0, 0.0, 0.0]), "band 'b': response is zero everywhere"),
        (dict(x=[200.0, 250.0, 250.0]), "band 'b': repeated wavelength/frequency node"),
        (dict(ref=500 * u.um), "band 'b': reference_wavelength 500 um lies outside the response curve "
                               r"\(200-300 um\); check its unit"),
        (dict(ref=[240.0, 250.0]), "band 'b': reference_wavelength must be one positive finite"),
        (dict(ref=-250.0), "band 'b': reference_wavelength must be one positive finite"),
    ],
)
def test_band_errors(kwargs, match):
    name = kwargs.get("name", "b")
    x, r = kwargs.get("x", _LAM), kwargs.get("r", _R)
    opts = {k: kwargs[k] for k in ("detector", "reference") if k in kwargs}
    if "ref" in kwargs:
        opts["reference_wavelength"] = kwargs["ref"]
    with pytest.raises(InputError, match=match):
        Band(name, x, r, **opts)


def test_constructor_errors():
    with pytest.raises(InputError, match=r"band 'm': wavelength must be one positive finite wavelength or frequency"):
        Band.monochromatic("m", [100.0, 200.0])
    with pytest.raises(InputError, match="band 'm': wavelength: unit s is neither a frequency nor a wavelength"):
        Band.monochromatic("m", 3 * u.s)
    with pytest.raises(InputError, match="band name must be a non-empty string, got 3"):
        Band.monochromatic(3, 100.0)
    for w in (0.0, 2.0, -0.1, True, "0.3"):
        with pytest.raises(InputError, match=r"band 't': fractional_width must be a number in \(0, 2\)"):
            Band.tophat("t", 100.0, w)
    for n in (1, 2.5, True):
        with pytest.raises(InputError, match="band 't': n_nodes must be an integer >= 2, got"):
            Band.tophat("t", 100.0, 0.3, n_nodes=n)
    with pytest.raises(InputError, match="band 't': center must be one positive finite"):
        Band.tophat("t", 0.0, 0.3)
    with pytest.raises(InputError, match="band 't': unknown detector 'ccd'"):
        Band.tophat("t", 100.0, 0.3, detector="ccd")


def test_from_file_errors(tmp_path):
    lam = np.linspace(200.0, 300.0, 5)
    plain = tmp_path / "plain.txt"
    plain.write_text("wavelength response\n" + "".join(f"{x} 0.5\n" for x in lam))
    with pytest.raises(InputError, match=r"band 'f': column 'wavelength' in .*plain.txt has no unit; "
                       r"write the file as ECSV with a unit in its header, e.g. "
                       r"'# - \{name: wavelength, unit: um, datatype: float64\}', "
                       r"or build the band with Band\(name, values \* u.um, response\)"):
        Band.from_file("f", plain)
    Table({"w": lam * u.um, "r": np.ones(5), "e": np.ones(5)}).write(tmp_path / "three.ecsv")
    with pytest.raises(InputError, match=r"band 'f': .*three.ecsv has 3 columns \(w, r, e\); expected 2"):
        Band.from_file("f", tmp_path / "three.ecsv")
    Table({"w": lam * u.km / u.s, "r": np.ones(5)}).write(tmp_path / "vel.ecsv")
    with pytest.raises(InputError, match="band 'f': abscissa: unit km / s is neither a frequency nor a wavelength"):
        Band.from_file("f", tmp_path / "vel.ecsv")
    Table({"w": lam * u.um, "r": np.ones(5) * u.Jy}).write(tmp_path / "jy.ecsv")
    with pytest.raises(InputError, match="band 'f': response must be dimensionless, got unit Jy"):
        Band.from_file("f", tmp_path / "jy.ecsv")
    with pytest.raises(InputError, match=r"band 'f': cannot read response file .*missing.ecsv"):
        Band.from_file("f", tmp_path / "missing.ecsv")
    masked = tmp_path / "masked.ecsv"
    t = Table({"w": lam * u.um, "r": np.ma.masked_array(np.ones(5), mask=[0, 0, 1, 0, 0])})
    t.write(masked)
    with pytest.raises(InputError, match=r"band 'f': 1 response value\(s\) are not finite"):
        Band.from_file("f", masked)


def test_bandset_errors():
    a = Band.tophat("a", 100.0, 0.3)
    with pytest.raises(InputError, match=r"BandSet takes a list of Band objects; wrap a single band: BandSet\(\[band\]\)"):
        BandSet(a)
    with pytest.raises(InputError, match="BandSet needs at least one band"):
        BandSet([])
    with pytest.raises(InputError, match="BandSet element 1 is a str, not a Band"):
        BandSet([a, "b"])
    with pytest.raises(InputError, match=r"duplicate band name\(s\) \['a'\]; give each band a unique name"):
        BandSet([a, Band.monochromatic("a", 100.0)])
    bs = BandSet([a, Band.monochromatic("m", 850.0)])
    with pytest.raises(InputError, match="no band named 'x'; known bands: a, m"):
        bs.index("x")
    with pytest.raises(InputError, match="no band named 'x'; known bands: a, m"):
        bs["x"]
    with pytest.raises(InputError, match="no band named 'x'"):
        bs.subset(["a", "x"])
    with pytest.raises(InputError, match="band index 2 out of range for 2 bands"):
        bs[2]
    with pytest.raises(InputError, match="bands are indexed by name or integer, got float"):
        bs[0.5]
    with pytest.raises(InputError, match=rf"spectrum_on_grid must have last axis of length n_grid = {NT + 1} "
                       r"\(BandSet.nu_grid_hz\), got shape \(3, 5\)"):
        bs.band_fluxes(np.ones((3, 5)))


def test_color_correction_errors():
    bs = BandSet([Band.tophat("a", 100.0, 0.3), Band.monochromatic("m", 850.0)])
    with pytest.raises(InputError, match="spectrum must be a callable f\\(nu_hz\\) -> flux density array, got ndarray"):
        bs.color_correction(np.ones(3))
    with pytest.raises(InputError, match=r"spectrum\(nu_grid_hz\) must return an array whose last axis has "
                       rf"length {NT + 1}, got shape \(\)"):
        bs.color_correction(lambda nu: 1.0)
    with pytest.raises(InputError, match=r"spectrum\(nu_grid_hz\) returned non-finite values"):
        bs.color_correction(lambda nu: np.full_like(nu, np.nan))
    nu_m = bs["m"].nu_ref_hz
    with pytest.raises(InputError, match=r"colour correction undefined: the spectrum is zero at the reference "
                       r"frequency of band\(s\) 'm'"):
        bs.color_correction(lambda nu: np.where(nu == nu_m, 0.0, 1.0))
    with pytest.raises(InputError, match=r"spectrum\(band nodes\) must return an array whose last axis"):
        bs["a"].color_correction(lambda nu: np.ones(3))
    with pytest.raises(InputError, match=r"band\(s\) 'a'"):
        bs["a"].color_correction(lambda nu: np.where(nu == bs["a"].nu_ref_hz, 0.0, 1.0))


def test_band_integration_matches_synphot_through_a_tabulated_response(tmp_path):
    # Reference: synphot (Observation.effstim in FLAM, the photon-weighted mean
    # F_lambda = int F_lambda R lambda dlambda / int R lambda dlambda) for a
    # tabulated response and a tabulated spectrum. In sedtemp's conventions that
    # is a photon-counting band with reference spectrum F_lambda = const
    # (F_nu ~ nu^-2, reference=-2.0): F_quoted(nu_ref) = <F_lambda> lambda_ref^2 / c,
    # exactly, for any nu_ref. Tolerance 1e-4 (both are trapezoid rules on fine grids).
    synphot = pytest.importorskip("synphot")
    from astropy.table import Table

    from sedtemp.planck import _planck_nu_si

    lam = np.linspace(200.0, 300.0, 401)
    resp = np.exp(-0.5 * ((lam - 250.0) / 18.0) ** 2)
    path = tmp_path / "resp.ecsv"
    Table({"wavelength": lam * u.um, "response": resp}).write(path)
    band = Band.from_file("t250", path, detector="photon", reference=-2.0)
    bs = BandSet([band])
    ours = bs.band_fluxes(_planck_nu_si(bs.nu_grid_hz, 18.0)[None])[0, 0]  # W m-2 Hz-1
    wl = np.linspace(150.0, 350.0, 40001) * u.um
    fnu = _planck_nu_si(wl.to_value(u.Hz, u.spectral()), 18.0) * u.W / u.m**2 / u.Hz
    sp = synphot.SourceSpectrum(synphot.models.Empirical1D, points=wl, lookup_table=fnu.to(u.Jy))
    bp = synphot.SpectralElement(synphot.models.Empirical1D, points=lam * u.um, lookup_table=resp)
    grid = np.linspace(200.0, 300.0, 200001) * u.um
    flam = synphot.Observation(sp, bp).effstim(flux_unit="flam", wavelengths=grid).to_value(u.W / u.m**2 / u.m)
    lam_ref = 299792458.0 / band.nu_ref_hz
    assert ours == pytest.approx(flam * lam_ref**2 / 299792458.0, rel=1e-4)
