"""Every data file bundled with sedtemp loads through importlib.resources (as from an installed wheel)."""

import tomllib
from importlib import resources

import astropy.units as u
import pytest
from astropy.table import Table

from sedtemp.pipeline import load_workflow, map_catalog, parse_workflow, read_catalog

DATA = resources.files("sedtemp") / "data"


def _files(node):
    for child in node.iterdir():
        if child.is_dir():
            yield from _files(child)
        elif not child.name.startswith("."):
            yield child


def test_every_bundled_file_is_known_and_loads():
    names = sorted(str(p).split("sedtemp/data/")[-1] for p in _files(DATA) if p.name != "__pycache__")
    assert names == ["demo/bands/k110.ecsv", "demo/bands/k170.ecsv", "demo/bands/k250.ecsv",
                     "demo/bands/k350.ecsv", "demo/bands/k500.ecsv", "demo/bands/k70.ecsv", "demo/demo.toml",
                     "demo/demo_catalog.ecsv", "demo/demo_truth.ecsv", "template.toml"]


def test_template_parses_as_a_workflow():
    data = tomllib.loads((DATA / "template.toml").read_text(encoding="utf-8"))
    wf = parse_workflow(data, source="template.toml")
    assert wf.catalog["id_column"] == "source_id" and [c["kind"] for c in wf.field["components"]] == ["isrf", "star", "cmb"]


@pytest.mark.parametrize("name", ["k70", "k110", "k170", "k250", "k350", "k500"])
def test_demo_band_curves_have_units(name):
    with resources.as_file(DATA / "demo" / "bands" / f"{name}.ecsv") as path:
        t = Table.read(path, format="ascii.ecsv")
    assert t["wavelength"].unit == u.um and len(t) == 160
    lam = int(name[1:])
    assert u.Quantity(t["wavelength"]).min() < lam * u.um < u.Quantity(t["wavelength"]).max()


def test_demo_workflow_and_catalogue_map():
    with resources.as_file(DATA / "demo" / "demo.toml") as path:
        wf = load_workflow(path)
        cat = read_catalog(wf.path(wf.catalog["path"]))
        truth = read_catalog(wf.path("demo_truth.ecsv"))
    mapped = map_catalog(cat, wf)
    assert len(mapped) == 300 and truth["src"].tolist() == cat["src"].tolist()
    assert int((mapped.skip_reason != "").sum()) == 3  # the three two-band sources (make_demo.py)
    # the invented place of the demo (sample_data/make_demo.py): RA 152.40, Dec +31.70 at 530 pc
    star = wf.field["components"][1]
    assert star["position"] == {"ra": 152.40, "dec": 31.70} and wf.catalog["distance"] == "530 pc"
    assert abs(float(cat["ra"].mean()) - 152.4) < 1.0 and abs(float(cat["dec"].mean()) - 31.7) < 1.0
