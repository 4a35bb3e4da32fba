"""`sedtemp init`: the bundled template, and [bands] guessed from a catalogue's column pairs."""

import tomllib
from pathlib import Path

import astropy.units as u
import numpy as np
import pytest
from astropy.table import Table
from invented import invented_catalog

from sedtemp.cli import main
from sedtemp.init_workflow import guess_columns, template_text, workflow_text
from sedtemp.pipeline import load_workflow

ROOT = Path(__file__).resolve().parents[1]


def test_template_is_package_data_and_equals_the_repository_copy():
    assert template_text() == (ROOT / "workflows" / "template.toml").read_text(encoding="utf-8")
    tomllib.loads(template_text())


def test_init_without_catalogue_writes_the_template(tmp_path, capsys):
    assert main(["init", str(tmp_path / "w.toml")]) == 0
    assert (tmp_path / "w.toml").read_text() == template_text()
    assert f"next: sedtemp check {tmp_path / 'w.toml'} --show" in capsys.readouterr().out
    assert main(["init", str(tmp_path / "w.toml")]) == 1
    assert "already exists; choose another name or add --force to overwrite it" in capsys.readouterr().err
    assert main(["init", str(tmp_path / "w.toml"), "--force", "--quiet"]) == 0
    assert capsys.readouterr().out == ""


def _table(columns):
    t = Table()
    t["id"] = ["a", "b"]
    for name, unit in columns.items():
        t[name] = np.array([1.0, 2.0]) * unit if unit is not None else np.array([1.0, 2.0])
    return t


@pytest.mark.parametrize("flux, err", [("F250", "E250"), ("flux_250", "flux_250_err"), ("S250", "dS250"),
                                       ("S250", "e_S250"), ("F250", "F250err"), ("f250", "sigma_f250"),
                                       ("flux_250", "flux_250_error"), ("S250", "E250")])
def test_recognised_pairings(flux, err):
    g = guess_columns(_table({flux: u.mJy, err: u.mJy}))
    (b,) = g.bands
    assert (b.name, b.flux, b.error, b.unit, b.wavelength_um) == ("b250", flux, err, "mJy", 250.0)
    assert g.problems == [] and g.id_column == "id"


def test_guesses_limits_positions_and_says_what_it_could_not():
    t = _table({"F70": u.Jy, "E70": u.Jy, "Fshort": u.Jy, "Fshort_err": u.Jy, "F500": None, "E500": None,
                "dist": u.pc, "dist_err": u.pc, "snr": None})
    t["L70"] = [True, False]
    t["RA"], t["DEC"] = [10.0, 11.0] * u.deg, [1.0, 2.0] * u.deg
    g = guess_columns(t)
    assert [(b.name, b.flux, b.error, b.limit) for b in g.bands] == [
        ("b70", "F70", "E70", "L70"), ("fshort", "Fshort", "Fshort_err", None), ("b500", "F500", "E500", None)]
    assert (g.ra_column, g.dec_column) == ("RA", "DEC")
    assert g.problems == [
        "band fshort: no wavelength in the column name 'Fshort'; give wavelength, tophat or response under "
        "[bands.fshort]",
        "band b500: column 'F500' has no unit; set unit = \"mJy\" (or Jy) under [bands.b500]"]
    assert "numeric columns not used: dist, dist_err, snr (e.g. distance_column" in g.notes[-1]


def test_no_pairs_found():
    g = guess_columns(_table({"a": u.Jy, "b": u.Jy}))
    assert g.bands == [] and g.problems == ["no flux/error column pair recognised; write the [bands.NAME] tables "
                                            "by hand (flux = \"...\", error = \"...\")"]


def test_init_from_catalogue_passes_check(tmp_path, capsys):
    cat = tmp_path / "data" / "cat.ecsv"
    cat.parent.mkdir()
    invented_catalog(6, 2, unit=u.mJy).write(cat)
    wf_path = tmp_path / "wf" / "mine.toml"
    assert main(["init", str(wf_path), "--catalog", str(cat)]) == 0
    out = capsys.readouterr().out
    assert "guessed (check these):\n  band b70: flux 'F70', error 'E70', unit mJy, centre 70 um" in out
    assert "id column: 'name'" in out and "could not guess" not in out
    wf = load_workflow(wf_path)
    assert wf.catalog["path"] == "../data/cat.ecsv" and wf.catalog["id_column"] == "name"
    assert list(wf.bands) == ["b70", "b160", "b250", "b350", "b500"]
    assert wf.bands["b160"]["tophat"] == {"center": "160 um", "width": 0.3}
    assert [c["kind"] for c in wf.field["components"]] == ["isrf", "cmb"]  # the template's star left out
    assert main(["check", str(wf_path)]) == 0
    assert "mine.toml: workflow valid; catalogue '../data/cat.ecsv': 6 source(s), 5 band(s)" in capsys.readouterr().out


def test_init_unreadable_catalogue(tmp_path, capsys):
    assert main(["init", str(tmp_path / "w.toml"), "--catalog", str(tmp_path / "none.fits")]) == 1
    assert "sedtemp init: error: catalogue file" in capsys.readouterr().err
    assert not (tmp_path / "w.toml").exists()


def test_workflow_text_keeps_comments_and_unset_columns_commented(tmp_path):
    cat = tmp_path / "c.ecsv"
    _table({"F250": None, "E250": None}).write(cat)
    text, _ = workflow_text(cat, workflow_path=tmp_path / "w.toml")
    assert '# unit = "mJy"   # NO UNIT in the catalogue: uncomment and set the right one' in text
    assert text.startswith("# sedtemp workflow template") and "[calibration]" in text
    assert tomllib.loads(text)["bands"] == {"b250": {"flux": "F250", "error": "E250",
                                                     "tophat": {"center": "250 um", "width": 0.3}}}
