"""Tests of the map workflow ([maps] section), the per-pixel field and the map demo."""

import json

import astropy.units as u
import numpy as np
import pytest
from astropy.coordinates import SkyCoord

from sedtemp.errors import ConfigError, InputError
from sedtemp.maps import (
    compare_pixels,
    make_map_demo,
    parse_map_workflow,
    run_map_workflow,
)
from sedtemp.maps.demo import _write_demo_inputs, demo_wcs
from sedtemp.maps.field import FieldSpec, pixel_fields


def _doc(**maps_extra):
    return {"maps": {"bands": {"b250": {"image": "a.fits", "error": "a_err.fits", "beam": "18 arcsec",
                                        "wavelength": 250}}, **maps_extra}}


# ------------------------------------------------------------------ parser
def test_parser_fills_defaults_and_uses_the_catalogue_band_keys():
    mw = parse_map_workflow(_doc(snr_floor=5.0))
    assert mw.maps["snr_floor"] == 5.0 and mw.maps["tile_size"] == 64
    assert mw.wf.bandset().names == ("b250",)
    model = mw.model()
    assert model.amplitude_name == "log10_N_H2"
    assert model.solid_angle_sr == pytest.approx(1.0)


def test_parser_errors_name_the_key():
    with pytest.raises(ConfigError, match=r"needs a \[maps\] section"):
        parse_map_workflow({})
    with pytest.raises(ConfigError, match=r"\[maps\] unknown key 'tiles'"):
        parse_map_workflow(_doc(tiles=3))
    with pytest.raises(ConfigError, match=r"\[maps\] snr_floor must be of type int or float, got 'x'"):
        parse_map_workflow(_doc(snr_floor="x"))
    doc = _doc()
    del doc["maps"]["bands"]["b250"]["image"]
    with pytest.raises(ConfigError, match=r"\[maps.bands.b250\] needs image ="):
        parse_map_workflow(doc)
    doc = _doc()
    doc["maps"]["bands"]["b250"]["noise"] = "1 MJy/sr"
    with pytest.raises(ConfigError, match=r"\[maps.bands.b250\] give exactly one of error .* or noise"):
        parse_map_workflow(doc)
    doc = _doc()
    del doc["maps"]["bands"]["b250"]["wavelength"]
    with pytest.raises(ConfigError, match=r"maps.bands.b250.*give exactly one of wavelength, tophat or response"):
        parse_map_workflow(doc)
    with pytest.raises(ConfigError, match=r"\[maps\] target 'b500' is not a band"):
        parse_map_workflow(_doc(target="b500"))


# ------------------------------------------------------------------ field per pixel
def test_star_distance_per_pixel_is_the_projected_separation():
    # reference library: astropy SkyCoord.separation; d = D tan(theta) (exact geometry)
    w = demo_wcs(30.0, 6)
    star = SkyCoord(131.65 * u.deg, 27.42 * u.deg)
    spec = FieldSpec({"components": [{"kind": "star", "teff": 2e4, "luminosity": 1e3,
                                      "position": {"ra": 131.65, "dec": 27.42}}], "distance": 450 * u.pc})
    assert spec.projected  # a separation on the sky bounds the distance from below
    ys, xs = np.array([0, 5, 2]), np.array([0, 3, 5])
    flds = pixel_fields(spec, w, ys, xs, {})
    for k, f in enumerate(flds):
        theta = w.pixel_to_world(xs[k], ys[k]).separation(star).to_value(u.rad)
        assert f.components[0].distance_m == pytest.approx((450 * u.pc).to_value(u.m) * np.tan(theta), rel=1e-12)


def test_field_errors():
    with pytest.raises(InputError, match="field: a star has a position, so the cloud's distance is needed"):
        FieldSpec({"components": [{"kind": "star", "teff": 2e4, "luminosity": 1e3,
                                   "position": {"ra": 1.0, "dec": 2.0}}]})
    with pytest.raises(InputError, match=r"field: unknown key\(s\) \['colour'\]"):
        FieldSpec({"components": [{"kind": "isrf"}], "colour": 1})
    with pytest.raises(InputError, match="give 'U' or 'U_map', not both"):
        FieldSpec({"components": [{"kind": "isrf", "U": 1.0, "U_map": "u.fits"}]})


def test_compare_pixels_is_compare_draws_per_pixel():
    from sedtemp.compare import compare_draws
    from sedtemp.fields import build_field
    from sedtemp.models import default_opacity

    op = default_opacity("gas")
    rng = np.random.default_rng(1)
    T, b = rng.normal(18, 1, (2, 50)), rng.normal(1.8, 0.1, (2, 50))
    flds = [build_field([{"kind": "isrf", "U": 1.0}]), None]
    out = compare_pixels(T, b, flds, op, seeds=[7, 8])
    ref = compare_draws(T[0] * u.K, b[0], flds[0], op, seed=7).columns()
    assert out["T_eq_median"][0] == ref["T_eq_median"]
    assert out["p_warmer"][0] == ref["p_warmer"]
    assert out["flag"][1] == 0 and np.isnan(out["T_eq_median"][1])


def test_u_and_a_v_from_maps_change_t_eq():
    # more U, higher T_eq; more A_V, lower T_eq (monotonic in the absorbed power; exact ordering)
    w = demo_wcs(30.0, 4)
    spec = FieldSpec({"components": [{"kind": "isrf", "U_map": "unused.fits"}], "A_V": "unused.fits"})
    ys, xs = np.array([0, 1, 2]), np.array([0, 1, 2])
    aux = {"0:U": np.array([1.0, 4.0, 4.0]), "A_V": np.array([0.0, 0.0, 5.0])}
    flds = pixel_fields(spec, w, ys, xs, aux)
    from sedtemp.equilibrium import equilibrium_temperature
    from sedtemp.models import default_opacity

    t = [equilibrium_temperature(f, default_opacity("gas")).to_value(u.K) for f in flds]
    assert t[1] > t[0] and t[2] < t[1]


# ------------------------------------------------------------------ runs
def test_run_map_workflow_writes_maps_report_and_resumes(tmp_path):
    demo = make_map_demo(seed=2, scale=6.0)
    text = _write_demo_inputs({**demo, "field": {"components": [], "uncertainty": 0.0}}, tmp_path)
    assert "[maps.bands.d500]" in text and (tmp_path / "map-demo.toml").is_file()
    rep = run_map_workflow(tmp_path / "map-demo.toml", output_dir=tmp_path / "out")
    assert rep["n_pixels"] == 64 and rep["skipped"] == {"fitted": 64}
    assert (tmp_path / "out" / "maps.fits").is_file()
    assert (tmp_path / "out" / "maps-quicklook.png").is_file()
    on_disk = json.loads((tmp_path / "out" / "map-report.json").read_text())
    assert on_disk["n_pixels"] == 64 and "compare_flags" not in on_disk
    again = run_map_workflow(tmp_path / "map-demo.toml", output_dir=tmp_path / "out")
    assert again["tiles_resumed"] == 1
    np.testing.assert_array_equal(again["hdul"]["T_MEDIAN"].data, rep["hdul"]["T_MEDIAN"].data)


def test_run_map_workflow_reports_input_errors_with_the_file(tmp_path):
    (tmp_path / "w.toml").write_text('[maps.bands.b]\nimage = "none.fits"\nnoise = "1 MJy/sr"\nwavelength = 250\n',
                                     encoding="utf-8")
    with pytest.raises(ConfigError, match=r"w.toml: band 'b': image file .*none.fits' does not exist"):
        run_map_workflow(tmp_path / "w.toml", output_dir=tmp_path / "o")
