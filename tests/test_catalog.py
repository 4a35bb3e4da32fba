"""Catalogue reading, mapping and validation: formats, units, every problem at once, speed."""

import time

import astropy.units as u
import numpy as np
import pytest
from astropy.table import Table

from sedtemp.errors import CatalogError
from sedtemp.pipeline.catalog import map_catalog, read_catalog, source_key, write_table
from sedtemp.pipeline.config import parse_workflow

_SI = u.W / u.m**2 / u.Hz
BANDS = ("b160", "b250", "b350")


def _workflow(**catalog):
    cat = {"path": "cat.ecsv", "id_column": "name", "distance": "400 pc", **catalog}
    bands = {b: {"flux": f"F{b[1:]}", "error": f"E{b[1:]}", "wavelength": f"{b[1:]} um"} for b in BANDS}
    return parse_workflow({"catalog": cat, "bands": bands, "model": {"beta": 1.8}})


def _table(n=5, seed=0):
    rng = np.random.default_rng(seed)
    t = Table()
    t["name"] = [f"C{i}" for i in range(n)]
    for b in BANDS:
        f = rng.uniform(100, 200, n)
        t[f"F{b[1:]}"] = f * u.mJy
        t[f"E{b[1:]}"] = 0.1 * f * u.mJy
    return t


def test_map_converts_to_si_exactly():
    t = _table()
    m = map_catalog(t, _workflow())
    expect = np.column_stack([t[f"F{b[1:]}"].quantity.to_value(_SI) for b in BANDS])  # astropy conversion
    np.testing.assert_array_equal(m.flux, expect)
    assert m.band_names == BANDS and list(m.keys) == [f"C{i}" for i in range(5)]
    np.testing.assert_allclose(m.distance_m, (400 * u.pc).to_value(u.m), rtol=1e-15)
    assert np.all(m.skip_reason == "")


@pytest.mark.parametrize("suffix, fmt", [(".ecsv", None), (".fits", None), (".xml", "votable"), (".csv", None)])
def test_formats_give_identical_mapping(tmp_path, suffix, fmt):
    t = _table()
    path = tmp_path / f"cat{suffix}"
    if suffix == ".csv":  # CSV with a units row under the header
        lines = [",".join(t.colnames), ",".join("" if t[c].unit is None else str(t[c].unit) for c in t.colnames)]
        lines += [",".join(repr(float(v)) if not isinstance(v, str) else v for v in row) for row in
                  zip(*[list(np.asarray(t[c])) for c in t.colnames], strict=True)]
        path.write_text("\n".join(lines) + "\n")
    else:
        t.write(path, format=fmt)
    back = read_catalog(path, format=fmt)
    np.testing.assert_array_equal(map_catalog(back, _workflow()).flux, map_catalog(t, _workflow()).flux)


def test_units_from_workflow_for_plain_csv(tmp_path):
    t = _table()
    plain = Table({c: np.asarray(t[c]) for c in t.colnames})
    path = tmp_path / "plain.csv"
    plain.write(path, format="ascii.csv")
    wf = _workflow()
    for b in BANDS:
        wf.bands[b]["unit"] = "mJy"
    np.testing.assert_array_equal(map_catalog(read_catalog(path), wf).flux, map_catalog(t, _workflow()).flux)
    with pytest.raises(CatalogError, match=r"band 'b160' flux: column 'F160' has no unit; add unit = \"mJy\""):
        map_catalog(read_catalog(path), _workflow())


def test_catalog_units_mapping_and_mismatch():
    t = _table()
    t["F250"].unit = None
    wf = _workflow(units={"F250": "mJy"})
    np.testing.assert_array_equal(map_catalog(t, wf).flux, map_catalog(_table(), _workflow()).flux)
    wf = _workflow()
    wf.bands["b160"]["unit"] = "Jy"
    with pytest.raises(CatalogError, match=r"column 'F160' has unit mJy but the workflow says Jy"):
        map_catalog(_table(), wf)


def test_every_problem_reported_at_once():
    t = _table(8)
    t.remove_column("F350")                       # missing column
    t["E250"].unit = u.K                          # not a flux density
    t["E160"][2] = np.nan                         # NaN error with a flux
    t["E160"][3] = 0.0                            # non-positive error
    t["F160"][4] = np.nan                         # NaN flux with an error
    t["name"][6] = "C1"                           # duplicate id
    with pytest.raises(CatalogError) as info:
        map_catalog(t, _workflow())
    msg = str(info.value)
    assert msg.startswith("catalogue 'cat.ecsv' has 6 problem(s):")
    for pattern in [r"band 'b350' flux: column 'F350' is not in the catalogue",
                    r"band 'b250' error: column 'E250': unit K is not a flux density, a surface brightness or a "
                    r"per-beam unit; use e.g. Jy, mJy, MJy/sr or Jy/beam",
                    r"band 'b160': error is NaN but the flux is not for 1 source\(s\): 'C2'",
                    r"band 'b160': error is not positive for 1 source\(s\): 'C3'",
                    r"band 'b160': flux is NaN but the error is not .* for 1 source\(s\): 'C4'",
                    r"1 duplicate id\(s\): 'C1'; ids must be unique"]:
        assert __import__("re").search(pattern, msg), pattern


def test_missing_id_column_and_distance():
    t = _table()
    wf = _workflow(id_column="src")
    with pytest.raises(CatalogError, match=r"\[catalog\] id_column: column 'src' is not in the catalogue"):
        map_catalog(t, wf)
    wf = parse_workflow({"catalog": {"path": "c", "id_column": "name"},
                         "bands": {"b160": {"flux": "F160", "error": "E160", "wavelength": 160.0}}})
    with pytest.raises(CatalogError, match=r"amplitude is a mass, which needs a distance"):
        map_catalog(t, wf)


def test_distance_column_needs_length_unit():
    t = _table()
    t["d"] = [300.0, 350, 400, 450, 500]
    wf = parse_workflow({"catalog": {"path": "c", "id_column": "name", "distance_column": "d"},
                         "bands": {"b160": {"flux": "F160", "error": "E160", "wavelength": 160.0}}})
    with pytest.raises(CatalogError, match=r"column 'd' has no unit; add it to \[catalog\] units"):
        map_catalog(t, wf)
    t["d"].unit = u.kpc
    m = map_catalog(t, wf)
    np.testing.assert_allclose(m.distance_m, (t["d"].quantity).to_value(u.m), rtol=1e-15)


def test_too_few_bands_skipped_with_reason():
    t = _table(4)
    for c in ("F250", "E250", "F350", "E350"):
        t[c][1] = np.nan  # unobserved: NaN in flux and error
    t["F350"][2], t["E350"][2] = np.nan, np.nan
    m = map_catalog(t, _workflow())  # beta fixed: 2 free parameters
    assert m.skip_reason[1] == "too_few_bands: 1 usable band(s) ['b160'], need 2"
    assert m.skip_reason[2] == "" and m.missing[2].tolist() == [False, False, True]
    assert m.err[2, 2] == np.inf and m.flux[2, 2] == 0.0


def test_limit_column_and_min_bands():
    t = _table(3)
    t["L160"] = [True, False, False]
    wf = _workflow(min_bands=3)
    wf.bands["b160"]["limit"] = "L160"
    m = map_catalog(t, wf)
    assert m.limit_only[:, 0].tolist() == [True, False, False]
    assert m.skip_reason[0] == "too_few_bands: 2 usable band(s) ['b250', 'b350'], need 3"


def test_source_key_stable_text():
    assert source_key(12.0) == "12" and source_key(b"A1 ") == "A1" and source_key(np.int64(7)) == "7"


def test_ten_thousand_rows_validate_in_seconds():
    t = _table(10_000, seed=1)
    t0 = time.perf_counter()
    m = map_catalog(t, _workflow())
    elapsed = time.perf_counter() - t0
    assert len(m) == 10_000
    assert elapsed < 5.0, f"validation of 10,000 rows took {elapsed:.1f} s"  # issue: "in seconds"


def test_write_table_atomic_round_trip(tmp_path):
    t = _table()
    path = write_table(t, tmp_path / "out" / "r.fits", format="fits")
    assert sorted(p.name for p in path.parent.iterdir()) == ["r.fits"]  # no temporary file left
    back = Table.read(path)
    np.testing.assert_array_equal(back["F160"], t["F160"])
    assert back["F160"].unit == u.mJy


def test_unreadable_catalogue(tmp_path):
    with pytest.raises(CatalogError, match=r"catalogue file .*none\.fits' does not exist"):
        read_catalog(tmp_path / "none.fits")
    bad = tmp_path / "bad.fits"
    bad.write_text("not a fits file")
    with pytest.raises(CatalogError, match=r"cannot read catalogue 'bad\.fits'"):
        read_catalog(bad)


# ------------------------------------------- surface brightness, per beam, unit typos
def _band_workflow(b250):
    """_workflow with extra keys (beam, solid_angle) in [bands.b250]."""
    cat = {"path": "cat.ecsv", "id_column": "name", "distance": "400 pc"}
    bands = {b: {"flux": f"F{b[1:]}", "error": f"E{b[1:]}", "wavelength": f"{b[1:]} um"} for b in BANDS}
    bands["b250"].update(b250)
    return parse_workflow({"catalog": cat, "bands": bands, "model": {"beta": 1.8}})


@pytest.mark.parametrize("beam", ["18 arcsec", 18.0, "367.1 arcsec2"])
def test_surface_brightness_and_per_beam_columns_give_the_jy_fit_inputs(beam):
    """MJy/sr x beam area and Jy/beam x one beam equal the Jy column astropy converts the same way."""
    t = _table()
    # the beam area of a circular Gaussian, pi FWHM^2 / (4 ln 2) (exact); 367.1 arcsec2 is 18" to 4 digits
    omega = (np.pi / (4 * np.log(2)) * (18 * u.arcsec) ** 2 if beam != "367.1 arcsec2"
             else 367.1 * u.arcsec**2)
    jy = map_catalog(t, _band_workflow({}))
    sb = t.copy()
    for c in ("F250", "E250"):  # the same photometry as a surface brightness over the beam (astropy)
        sb[c] = (t[c].quantity / omega).to(u.MJy / u.sr)
    got = map_catalog(sb, _band_workflow({"beam": beam}))
    np.testing.assert_allclose(got.flux, jy.flux, rtol=1e-12)
    np.testing.assert_allclose(got.err, jy.err, rtol=1e-12)
    pb = t.copy()  # a point source: its peak in Jy/beam is its flux in Jy (astropy's beam equivalency)
    for c in ("F250", "E250"):
        per_beam = t[c].quantity.to_value(u.Jy) * u.Jy / u.beam
        assert per_beam.to(u.MJy / u.sr, u.beam_angular_area(omega)).value * omega.to_value(u.sr) * 1e6 == \
            pytest.approx(t[c].quantity.to_value(u.Jy), rel=1e-12)
        pb[c] = per_beam
    got = map_catalog(pb, _band_workflow({"beam": beam}))
    np.testing.assert_allclose(got.flux, jy.flux, rtol=1e-12)


def test_surface_brightness_with_a_solid_angle():
    t = _table()
    sb = t.copy()
    for c in ("F250", "E250"):
        sb[c] = (t[c].quantity / (500 * u.arcsec**2)).to(u.MJy / u.sr)
    got = map_catalog(sb, _band_workflow({"solid_angle": "500 arcsec2"}))
    np.testing.assert_allclose(got.flux, map_catalog(t, _band_workflow({})).flux, rtol=1e-12)


def test_surface_brightness_without_a_solid_angle_is_refused():
    t = _table()
    t["F250"] = t["F250"].value * u.MJy / u.sr
    with pytest.raises(CatalogError, match=r"band 'b250' flux: column 'F250': unit MJy / sr is a surface "
                       r"brightness; give the solid angle .* \(add it under \[bands.b250\]\)"):
        map_catalog(t, _band_workflow({}))
    t["F250"] = t["F250"].value * u.Jy / u.beam
    with pytest.raises(CatalogError, match=r"unit Jy / beam is per beam; give the beam .* \(add it under "
                       r"\[bands.b250\]\)"):
        map_catalog(t, _band_workflow({}))


def test_unit_typo_gets_a_suggestion_and_repeats_are_grouped():
    t = _table()
    for c in t.colnames[1:]:
        t[c] = t[c].value  # no units: the workflow states them
    wf = _workflow(units=dict.fromkeys(t.colnames[1:], "mjy"))
    with pytest.raises(CatalogError, match=r"is not a unit \(did you mean 'mJy' or 'MJy'\?\)") as err:
        map_catalog(t, wf)
    lines = str(err.value).splitlines()[1:]
    assert len(lines) == 6 and len(set(lines)) == 6  # one line per column: flux and error of 3 bands


def test_bad_beam_in_the_workflow_names_its_line():
    from sedtemp.errors import ConfigError
    from sedtemp.pipeline import load_workflow

    with pytest.raises(ConfigError, match=r"\[bands.b250\] 'beam': beam: '18 km' is neither an angle"):
        _band_workflow({"beam": "18 km"})
    with pytest.raises(ConfigError, match=r"\[bands.b250\] 'beem': unknown key \(did you mean 'beam'\?\)"):
        _band_workflow({"beem": "18 arcsec"})
    del load_workflow
