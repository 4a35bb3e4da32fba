"""Workflow TOML schema: defaults, every error with its message and line, builders, entry points."""

import sys
import textwrap

import astropy.units as u
import numpy as np
import pytest

from sedtemp import fields
from sedtemp.errors import ConfigError
from sedtemp.pipeline.config import (
    load_workflow,
    lookup_model,
    parse_quantity,
    parse_workflow,
)
from sedtemp.priors import Gaussian, Uniform

BASE = """\
[catalog]
path = "cat.ecsv"
id_column = "name"
distance = "400 pc"

[bands.b160]
flux = "F160"
error = "E160"
tophat = { center = "160 um", width = 0.3 }

[bands.b250]
flux = "F250"
error = "E250"
wavelength = "250 um"
calibration = "long"

[calibration]
long = 0.05
"""


def _write(tmp_path, text, name="wf.toml"):
    p = tmp_path / name
    p.write_text(textwrap.dedent(text))
    return p


def test_defaults_filled_and_paths_relative(tmp_path):
    wf = load_workflow(_write(tmp_path, BASE))
    assert wf.run == {"seed": 0, "executor": "process", "workers": 0, "chunk_size": 64, "scheduler": ""}
    assert wf.fit["method"] == "grid" and wf.output["format"] == "ecsv"
    assert list(wf.bands) == ["b160", "b250"]  # file order is band order
    assert wf.path(wf.catalog["path"]) == tmp_path / "cat.ecsv"
    assert wf.source == "wf.toml"


def test_bandset_and_calibration_built(tmp_path):
    wf = load_workflow(_write(tmp_path, BASE))
    bs = wf.bandset()
    # reference frequencies: c / lambda, checked against astropy's spectral equivalency
    expect = (np.array([160.0, 250.0]) * u.um).to_value(u.Hz, equivalencies=u.spectral())
    np.testing.assert_allclose(bs.nu_ref_hz, expect, rtol=1e-12)
    cal = wf.calibration_groups()
    np.testing.assert_array_equal(cal.matrix(bs.names), [[0.0], [0.05]])


def test_unknown_key_names_key_and_line(tmp_path):
    text = BASE.replace('error = "E160"', 'error = "E160"\nerorr_col = "x"')
    with pytest.raises(ConfigError, match=r"wf\.toml line 9: \[bands\.b160\] 'erorr_col': unknown key"):
        load_workflow(_write(tmp_path, text))


def test_wrong_type_names_key_and_line(tmp_path):
    text = BASE + "\n[run]\nworkers = \"two\"\n"
    line = text.splitlines().index('workers = "two"') + 1
    with pytest.raises(ConfigError, match=rf"line {line}: \[run\] 'workers': must be of type integer, got 'two'"):
        load_workflow(_write(tmp_path, text))


def test_bool_is_not_an_integer(tmp_path):
    text = BASE + "\n[run]\nchunk_size = true\n"
    with pytest.raises(ConfigError, match=r"\[run\] 'chunk_size': must be of type integer, got True"):
        load_workflow(_write(tmp_path, text))


def test_unknown_section(tmp_path):
    text = BASE + "\n[fitting]\nmethod = 'grid'\n"
    line = text.splitlines().index("[fitting]") + 1
    with pytest.raises(ConfigError, match=rf"line {line}: unknown section or key 'fitting'"):
        load_workflow(_write(tmp_path, text))


def test_choice_checked(tmp_path):
    with pytest.raises(ConfigError, match=r"\[run\] 'executor': must be one of \['process', 'dask', 'mpi', 'serial'\]"):
        load_workflow(_write(tmp_path, BASE + "\n[run]\nexecutor = 'slurm'\n"))


def test_required_key_missing(tmp_path):
    with pytest.raises(ConfigError, match=r"\[catalog\] 'id_column': is required but missing"):
        load_workflow(_write(tmp_path, BASE.replace('id_column = "name"\n', "")))


def test_missing_catalog_section():
    with pytest.raises(ConfigError, match=r"the \[catalog\] section is required"):
        parse_workflow({"bands": {}})


def test_invalid_toml_reports_position(tmp_path):
    with pytest.raises(ConfigError, match=r"wf\.toml: not valid TOML: .*line 2"):
        load_workflow(_write(tmp_path, "[run]\nseed = = 3\n"))


def test_missing_file(tmp_path):
    with pytest.raises(ConfigError, match=r"cannot read workflow file .*nope\.toml"):
        load_workflow(tmp_path / "nope.toml")


def test_undefined_calibration_group(tmp_path):
    text = BASE.replace('calibration = "long"', 'calibration = "lung"')
    with pytest.raises(ConfigError, match=r"line 15: \[bands\.b250\] 'calibration': group 'lung' is not defined"):
        load_workflow(_write(tmp_path, text))


def test_band_needs_exactly_one_response(tmp_path):
    text = BASE.replace('wavelength = "250 um"', 'wavelength = "250 um"\nresponse = "r.ecsv"')
    with pytest.raises(ConfigError, match=r"line 11: \[bands\.b250\]: give exactly one of wavelength, tophat or response"):
        load_workflow(_write(tmp_path, text))


def test_distance_and_column_exclusive(tmp_path):
    text = BASE.replace('distance = "400 pc"', 'distance = "400 pc"\ndistance_column = "d"')
    with pytest.raises(ConfigError, match=r"\[catalog\] 'distance_column': give either distance or distance_column"):
        load_workflow(_write(tmp_path, text))


def test_bad_band_definition_reported_with_band(tmp_path):
    text = BASE.replace("width = 0.3", "width = 3.0")
    wf = load_workflow(_write(tmp_path, text))
    with pytest.raises(ConfigError, match=r"\[bands\.b160\]: band 'b160': fractional_width must be a number in \(0, 2\)"):
        wf.bandset()


def test_priors_built(tmp_path):
    text = BASE + """
[priors.T]
kind = "uniform"
low = 5
high = 60

[priors.beta]
kind = "gaussian"
mean = 1.8
sigma = 0.3
low = 0.0
high = 4.0
"""
    pr = load_workflow(_write(tmp_path, text)).build_prior()
    assert isinstance(pr["T"], Uniform) and (pr["T"].low, pr["T"].high) == (5.0, 60.0)
    assert isinstance(pr["beta"], Gaussian) and pr["beta"].mean == 1.8 and pr["beta"].high == 4.0


def test_prior_kind_and_arguments_checked_when_read(tmp_path):
    # checked when the workflow is read (so `sedtemp check` fails), not at fitting time
    with pytest.raises(ConfigError, match=r"line 21: \[priors\.T\] 'kind': must be one of \['gaussian'"):
        load_workflow(_write(tmp_path, BASE + '\n[priors.T]\nkind = "flat"\nlow = 1\nhigh = 2\n'))
    with pytest.raises(ConfigError, match=r"\[priors\.T\]: kind 'gaussian' needs \['sigma'\]"):
        load_workflow(_write(tmp_path, BASE + '\n[priors.T]\nkind = "gaussian"\nmean = 1\n'))


def test_model_built_with_distance(tmp_path):
    wf = load_workflow(_write(tmp_path, BASE + '\n[model]\nname = "thin"\nbeta = 1.7\n'))
    m = wf.build_model(distance=400 * u.pc)
    assert m.param_names == ("log10_mass", "T")
    # the model's distance is the one given, in m (astropy conversion)
    assert m.distance_m == pytest.approx((400 * u.pc).to_value(u.m), rel=1e-12)


def test_unknown_model_lists_choices():
    with pytest.raises(ConfigError, match=r"unknown model 'warm'; choose one of \['thick', 'thin', 'two_temperature'"):
        lookup_model("warm")


def test_parse_quantity():
    assert parse_quantity("0.48 kpc", "pc", "d").to_value(u.pc) == pytest.approx(480.0, rel=1e-12)
    assert parse_quantity(3.0, "pc", "d").to_value(u.pc) == 3.0
    with pytest.raises(ConfigError, match=r"\[catalog\] distance: unit K cannot be converted to pc"):
        parse_quantity("3 K", "pc", "[catalog] distance")
    with pytest.raises(ConfigError, match=r"d: cannot read 'far' as a quantity"):
        parse_quantity("far", "pc", "d")


def test_digest_stable_and_content_sensitive(tmp_path):
    a = load_workflow(_write(tmp_path, BASE, "a.toml"))
    b = load_workflow(_write(tmp_path, "# a comment\n" + BASE, "b.toml"))
    c = load_workflow(_write(tmp_path, BASE.replace("0.05", "0.06"), "c.toml"))
    assert a.digest == b.digest  # comments and layout do not change the workflow
    assert a.digest != c.digest and len(a.digest) == 64


def _fake_distribution(tmp_path, group, name, target_module, code):
    """A minimal installed distribution (dist-info on sys.path) declaring one entry point."""
    (tmp_path / f"{target_module}.py").write_text(code)
    info = tmp_path / "sedtemp_plugin_demo-0.1.dist-info"
    info.mkdir()
    (info / "METADATA").write_text("Metadata-Version: 2.1\nName: sedtemp-plugin-demo\nVersion: 0.1\n")
    (info / "entry_points.txt").write_text(f"[{group}]\n{name} = {target_module}:Thing\n")


def test_entry_point_model(tmp_path, monkeypatch):
    _fake_distribution(tmp_path, "sedtemp.models", "flat", "plugin_model_mod",
                       "from sedtemp.models import ModifiedBlackbody\nclass Thing(ModifiedBlackbody):\n    pass\n")
    monkeypatch.syspath_prepend(str(tmp_path))
    from sedtemp.pipeline import config

    config._registered.cache_clear()  # names are resolved once per process
    lookup_model.cache_clear()
    cls = lookup_model("flat")
    assert cls.__name__ == "Thing" and cls.__module__ == "plugin_model_mod"
    sys.modules.pop("plugin_model_mod", None)
    config._registered.cache_clear()
    lookup_model.cache_clear()


def test_entry_point_field(tmp_path, monkeypatch):
    _fake_distribution(tmp_path, "sedtemp.fields", "glow", "plugin_field_mod",
                       "def Thing(**kw):\n    return ('glow', kw)\n")
    monkeypatch.syspath_prepend(str(tmp_path))
    fields._registered.cache_clear()  # kinds are resolved once per process
    fields.field_factory.cache_clear()
    assert fields.field_factory("glow")(U=2.0) == ("glow", {"U": 2.0})
    with pytest.raises(ConfigError, match=r"unknown field 'nope'; choose one of .*'glow'"):
        fields.field_factory("nope")
    sys.modules.pop("plugin_field_mod", None)
    fields._registered.cache_clear()
    fields.field_factory.cache_clear()


def test_bundled_template_workflow_is_valid():
    """workflows/template.toml lists every key; it must pass the schema as it stands."""
    from pathlib import Path

    path = Path(__file__).resolve().parents[1] / "workflows" / "template.toml"
    wf = load_workflow(path)
    assert wf.run["executor"] == "process" and [c["kind"] for c in wf.field["components"]] == ["isrf", "star", "cmb"]
    assert wf.build_prior()["T"].high == 100.0
    assert (wf.output["source_plots"], wf.output["max_source_plots"]) == ("flagged", 20)  # documented defaults


def test_output_plot_keys_defaults_and_file(tmp_path):
    path = _write(tmp_path, BASE)
    wf = load_workflow(path)
    assert wf.output["plots"] is True
    assert wf.output["source_plots"] == "flagged" and wf.output["max_source_plots"] == 20
    assert wf.file == path.resolve()  # recorded in results for `sedtemp plot --source`
    assert parse_workflow({"catalog": {"path": "c", "id_column": "i"},
                           "bands": {"b": {"flux": "F", "error": "E", "wavelength": 250}}}).file is None


def test_output_plot_keys_checked(tmp_path):
    text = BASE + '\n[output]\nsource_plots = "some"\n'
    line = text.splitlines().index('source_plots = "some"') + 1
    with pytest.raises(ConfigError, match=rf"line {line}: \[output\] 'source_plots': must be one of "
                                          r"\['none', 'flagged', 'all'\], got 'some'"):
        load_workflow(_write(tmp_path, text))
    with pytest.raises(ConfigError, match=r"\[output\] 'max_source_plots': must be >= 0 \(0: no per-source "
                                          r"plots\), got -1"):
        load_workflow(_write(tmp_path, BASE + "\n[output]\nmax_source_plots = -1\n"))
