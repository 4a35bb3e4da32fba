"""Bad inputs, one parametrised table: each is refused when the workflow or catalogue is read
(so `sedtemp check` fails too), with a message naming the key and the remedy."""

import astropy.units as u
import numpy as np
import pytest
from astropy.table import Table
from invented import catalog_workflow_data, invented_catalog

from sedtemp.errors import CatalogError, ConfigError
from sedtemp.pipeline import map_catalog, parse_workflow, read_catalog, run

# (description, workflow sections changed, message expected)
WORKFLOW_CASES = [
    ("prior low > high", {"priors": {"T": {"kind": "uniform", "low": 60.0, "high": 5.0}}},
     r"\[priors\.T\] 'low': low = 60\.0 is above high = 5\.0; swap them"),
    ("prior low = high", {"priors": {"T": {"kind": "uniform", "low": 20.0, "high": 20.0}}},
     r"\[priors\.T\] 'low': low = high = 20\.0 leaves no room"),
    ("unknown prior kind", {"priors": {"T": {"kind": "flat", "low": 5.0, "high": 60.0}}},
     r"\[priors\.T\] 'kind': must be one of \['gaussian', 'loguniform', 'uniform', 'uniform_amplitude'\], got 'flat'"),
    ("prior for a fixed parameter", {"model": {"beta": 1.8}, "priors": {"beta": {"kind": "uniform", "low": 1.0,
                                                                               "high": 2.5}}},
     r"\[priors\.beta\]: beta is fixed by \[model\] beta = 1\.8; remove \[priors\.beta\]"),
    ("loguniform from 0", {"priors": {"T": {"kind": "loguniform", "low": 0.0, "high": 60.0}}},
     r"\[priors\.T\] 'low': a log-uniform prior needs low > 0, got 0\.0"),
    ("negative sigma", {"priors": {"beta": {"kind": "gaussian", "mean": 1.8, "sigma": -0.2}}},
     r"\[priors\.beta\] 'sigma': must be > 0, got -0\.2"),
    ("T prior below the CMB", {"priors": {"T": {"kind": "uniform", "low": 1.0, "high": 60.0}}},
     r"T low = 1\.0 K is below the CMB temperature 2\.725 K at z = 0"),
    ("one T node", {"fit": {"n_T": 1}}, r"\[fit\] 'n_T': a grid needs at least 2 nodes, got 1"),
    ("negative field uncertainty", {"field": {"uncertainty": -0.1}},
     r"\[field\] 'uncertainty': is a fractional 1-sigma and cannot be negative, got -0\.1"),
    ("workers -1", {"run": {"workers": -1}}, r"\[run\] 'workers': must be 0 \(all cores\) or 1\.\.1024, got -1"),
    ("workers 100000", {"run": {"workers": 100000}}, r"\[run\] 'workers': must be 0 \(all cores\) or 1\.\.1024"),
    ("n_keep > n_draws", {"output": {"n_keep": 500}},
     r"\[output\] 'n_keep': 500 draws kept but \[fit\] n_draws = 100 drawn \(draws would repeat\)"),
    ("output name leaves the folder", {"output": {"name": "../../x"}},
     r"\[output\] 'name': must be a plain file name \(no folders, not hidden\), got '\.\./\.\./x'"),
    ("distance far from the redshift's", {"catalog": {"distance": "400 pc", "redshift": 0.5}},
     r"\[catalog\] 'distance': 0\.0004 Mpc disagrees with redshift 0\.5 \(luminosity distance"),
    ("unknown key", {"fit": {"n_temps": 3}}, r"\[fit\] 'n_temps': unknown key"),
    ("misspelt key", {"fit": {"n_draw": 300}}, r"\[fit\] 'n_draw': unknown key \(did you mean 'n_draws'\?\)"),
    ("negative opacity uncertainty", {"compare": {"opacity_uncertainty": -0.3}},
     r"\[compare\] 'opacity_uncertainty': is a fractional 1-sigma and cannot be negative, got -0\.3"),
    ("unknown field kind", {"field": {"components": [{"kind": "isfr", "U": 1.0}]}},
     r"\[\[field\.components\]\] 1: unknown field kind 'isfr' \(did you mean 'isrf'\?\)"),
    ("beam not an angle", {"bands": {"b250": {"flux": "F250", "error": "E250", "wavelength": "250 um",
                                              "beam": "18 kg"}}},
     r"\[bands\.b250\] 'beam': beam: '18 kg' is neither an angle"),
]


@pytest.mark.parametrize("what, sections, match", WORKFLOW_CASES, ids=[c[0] for c in WORKFLOW_CASES])
def test_bad_workflow_refused_when_read(what, sections, match):
    data = catalog_workflow_data()
    for name, values in sections.items():
        data[name] = {**data.get(name, {}), **values} if name != "priors" else {**values}
    with pytest.raises(ConfigError, match=match):
        parse_workflow(data)


def test_band_far_outside_the_far_ir_refused():
    data = catalog_workflow_data()
    data["bands"]["b70"]["tophat"] = {"center": "0.7 um", "width": 0.3}  # a unit slip: um for mm
    with pytest.raises(ConfigError, match=r"\[bands\.b70\]: reference wavelength 0\.7 um is outside the "
                                          r"far-IR/submm range 10 um - 1 cm"):
        parse_workflow(data).bandset()


def _csv(tmp_path, rows, header="name,F70,E70,F160,E160,F250,E250,F350,E350,F500,E500,lim"):
    p = tmp_path / "cat.csv"
    p.write_text(header + "\n" + ",".join(["", *["Jy"] * 10, ""]) + "\n" + "\n".join(rows) + "\n")
    return p


def _rows(t, ids, lims):
    out = []
    for r, i, lim in zip(t, ids, lims, strict=True):
        out.append(",".join([i, *(f"{float(r[c]):.6e}" for c in t.colnames[1:]), lim]))
    return out


def test_csv_true_false_limit_column_read_by_meaning(tmp_path):
    t = invented_catalog(4, 3)
    data = catalog_workflow_data()
    data["bands"]["b500"]["limit"] = "lim"
    wf = parse_workflow(data)
    m = map_catalog(read_catalog(_csv(tmp_path, _rows(t, ["A", "B", "C", "D"], ["False", "True", "false", "no"]))), wf)
    assert m.limit_only[:, -1].tolist() == [False, True, False, False]  # bool("False") would be True


def test_csv_bad_limit_text_refused(tmp_path):
    t = invented_catalog(2, 3)
    data = catalog_workflow_data()
    data["bands"]["b500"]["limit"] = "lim"
    with pytest.raises(CatalogError, match=r"band 'b500' limit: column 'lim' holds 'maybe'; use true/false"):
        map_catalog(read_catalog(_csv(tmp_path, _rows(t, ["A", "B"], ["maybe", "True"]))), parse_workflow(data))


def test_csv_ids_with_leading_zeros_kept_as_text(tmp_path):
    t = invented_catalog(2, 3)
    tab = read_catalog(_csv(tmp_path, _rows(t, ["001", "002"], ["0", "0"])))
    assert tab["name"].tolist() == ["001", "002"]
    m = map_catalog(tab, parse_workflow(catalog_workflow_data()))
    assert m.keys.tolist() == ["001", "002"]


def test_nan_and_empty_ids_refused():
    t = invented_catalog(3, 3)
    t["num"] = [1.0, np.nan, 3.0]
    data = catalog_workflow_data(catalog={"id_column": "num"})
    with pytest.raises(CatalogError, match=r"\[catalog\] id_column 'num': 1 source\(s\) without an id \(empty, "
                                           r"masked or NaN\) at row\(s\) \[1\]"):
        map_catalog(t, parse_workflow(data))


def test_negative_field_column_refused():
    t = invented_catalog(3, 3)
    t["U"] = [1.0, -2.0, 3.0]
    wf = parse_workflow(catalog_workflow_data(field={"components": [{"kind": "isrf", "U_column": "U"}]}))
    with pytest.raises(CatalogError, match=r"field component 'isrf': column 'U' for 'U' is negative .* for 1 "
                                           r"source\(s\): 'S001'"):
        map_catalog(t, wf)


def test_run_with_a_path_string_and_on_an_empty_table(tmp_path):
    t = invented_catalog(2, 3)
    t.write(tmp_path / "c.ecsv")
    wf = parse_workflow(catalog_workflow_data(field={"components": [{"kind": "isrf", "U": 1.0}]}))
    res = run(str(tmp_path / "c.ecsv"), wf)
    assert res["name"].tolist() == ["S000", "S001"]
    empty = run(t[:0], wf, output_dir=tmp_path / "out")
    assert len(empty) == 0 and {"T_median", "T_eq_point", "heating_class", "status"} <= set(empty.colnames)
    assert empty["T_median"].unit == u.K
    assert "sources: 0 (0 ok, 0 skipped, 0 failed)" in (tmp_path / "out" / "results-report.txt").read_text()


def test_run_on_something_else_refused():
    from sedtemp.errors import InputError

    with pytest.raises(InputError, match=r"table must be an astropy Table, a MappedCatalog or a catalogue path, got list"):
        run([1, 2], parse_workflow(catalog_workflow_data()))


def test_empty_table_file_reads(tmp_path):
    p = tmp_path / "e.csv"
    p.write_text("name,F70\n")
    assert len(read_catalog(p)) == 0 and isinstance(read_catalog(p), Table)
