"""A run that does not hold its results table (``return_table=False``, what ``sedtemp run`` uses):
the report, gathered chunk by chunk, and the files equal those of the run that returns the table."""

import json
from collections import Counter

import astropy.units as u
import numpy as np
import pytest
from astropy.table import Table
from invented import catalog_workflow_data, invented_catalog

from sedtemp.absorption import EXTRAPOLATION_WARN_FRACTION
from sedtemp.pipeline import batch
from sedtemp.pipeline.batch import run_batch
from sedtemp.pipeline.catalog import map_catalog
from sedtemp.pipeline.config import parse_workflow
from sedtemp.pipeline.report import RunTally, run_summary, summary_lines, write_report
from sedtemp.pipeline.schema import CLASS_COLUMN, FIT_FLAGS_COLUMN, NONE_TEXT, STATUS_FAILED, STATUS_OK


def _legacy_summary(tab):
    """run_summary as it was computed of the whole table at once (the reference)."""
    status = Counter(str(s) for s in tab["status"])
    ok = np.asarray(tab["status"]) == STATUS_OK
    flags = [set() if str(f) in ("", NONE_TEXT) else set(str(f).split(",")) for f in tab[FIT_FLAGS_COLUMN]]
    quality = {label: int(sum(1 for f, o in zip(flags, ok, strict=True) if o and flag in f))
               for flag, label in (("poor_fit", "poor fit"), ("prior_limited", "prior-limited"),
                                   ("unconverged", "unconverged"))}

    def rng(name, rows):
        if name not in tab.colnames or not rows.any():
            return None
        v = np.asarray(tab[name], float)[rows]
        v = v[np.isfinite(v)]
        return None if not v.size else (float(v.min()), float(v.max()))

    classes = {}
    cls = np.asarray(tab[CLASS_COLUMN], dtype=str)
    for name in sorted(set(cls[ok])):
        rows = ok & (cls == name)
        classes[name] = {"n": int(rows.sum()), "T": rng("T_median", rows), "beta": rng("beta_median", rows),
                         "ratio": rng("ratio_median", rows)}
    ids = [str(v) for v in tab[tab.colnames[0]]]
    nxt = [ids[i] for i in range(len(tab)) if not ok[i] and str(tab["status"][i]) == STATUS_FAILED]
    nxt += [ids[i] for i in range(len(tab)) if ok[i] and "poor_fit" in flags[i]]
    sure = np.abs(np.asarray(tab["p_warmer"], float) - 0.5)
    nxt += [ids[i] for i in np.argsort(-np.nan_to_num(sure)) if ok[i] and cls[i] in ("extra_heating", "shielded")]
    f = np.asarray(tab["opacity_extrapolated_fraction"], float)[ok]
    f = f[np.isfinite(f)]
    extra = None if f.size == 0 else (int(np.sum(f > EXTRAPOLATION_WARN_FRACTION)), float(f.max()))
    return {"status": dict(status), "fit_quality": quality, "classes": classes,
            "check_next": list(dict.fromkeys(nxt))[:10], "opacity_extrapolated": extra}


def _invented_results(n, seed):
    """A results-like table (invented values) with many ties in p_warmer and every status."""
    rng = np.random.default_rng(seed)
    t = Table()
    t["name"] = [f"S{i:04d}" for i in range(n)]
    t["status"] = rng.choice(["ok", "ok", "ok", "skipped", "failed"], n)
    t["reason"] = [f"why {i}" if s != "ok" else "" for i, s in enumerate(t["status"])]
    t[FIT_FLAGS_COLUMN] = rng.choice(["none", "poor_fit", "prior_limited,unconverged", "poor_fit,unconverged"],
                                     n, p=[0.85, 0.05, 0.05, 0.05])
    t[CLASS_COLUMN] = rng.choice(["consistent", "extra_heating", "shielded", "none"], n)
    t["p_warmer"] = rng.choice([0.0, 1.0, 0.5, 0.93, np.nan], n)  # ties: the ranking must keep their order
    t["T_median"] = rng.uniform(8, 40, n)
    t["T_median"][::7] = np.nan
    t["beta_median"] = rng.uniform(1, 2.5, n)
    t["ratio_median"] = rng.uniform(0.5, 2, n)
    t["opacity_extrapolated_fraction"] = rng.uniform(0, 0.2, n)
    t.meta["workflow_sha256"] = "abc"
    return t


@pytest.mark.parametrize("seed", [0, 1, 2])
def test_tally_of_chunks_equals_the_summary_of_the_whole_table(seed):
    tab = _invented_results(3000, seed)
    ref = _legacy_summary(tab)
    assert run_summary(tab) == ref
    rng = np.random.default_rng(seed)
    cuts = np.sort(rng.choice(np.arange(1, len(tab)), 25, replace=False))
    for ids in (None, list(tab["name"])):
        tally = RunTally(ids)
        for a, b in zip([0, *cuts], [*cuts, len(tab)], strict=True):
            part = tab[a:b]
            if a:
                part.meta.clear()  # as streamed: the metadata come with the first chunk only
            tally.add(part)
        assert tally.summary() == ref
        assert run_summary(tally) == ref
        assert tally.n == len(tab) and tally.workflow_sha256 == "abc"
        assert tally.failed == [(str(r["name"]), str(r["reason"])) for r in tab if r["status"] == "failed"]
        assert tally.skipped == [(str(r["name"]), str(r["reason"])) for r in tab if r["status"] == "skipped"]
        assert summary_lines(tally.summary(), tally.n) == summary_lines(ref, len(tab))


def test_report_of_a_tally_equals_the_report_of_the_table(tmp_path):
    tab = _invented_results(500, 4)
    tally = RunTally()
    for a in range(0, len(tab), 64):
        tally.add(tab[a:a + 64])
    kw = {"seconds": 3.0, "n_resumed": 10, "checkpoints": {"damaged": ["x"]}}
    r1 = write_report(tab, tmp_path / "a", **kw)
    r2 = write_report(tally, tmp_path / "b", **kw)
    assert r1 == r2
    assert (tmp_path / "a.txt").read_text() == (tmp_path / "b.txt").read_text()
    assert (tmp_path / "a.json").read_text() == (tmp_path / "b.json").read_text()


@pytest.fixture
def fixed_date(monkeypatch):
    real = batch.run_metadata
    monkeypatch.setattr(batch, "run_metadata", lambda wf, m: {**real(wf, m), "date_utc": "2000-01-01T00:00:00Z"})


def _catalogue():
    t = invented_catalog(16, 3)
    for w in (160, 250, 350, 500):  # two sources with one band only: skipped
        t[f"F{w}"][[4, 11]] = np.nan * u.Jy
        t[f"E{w}"][[4, 11]] = np.nan * u.Jy
    return t


def _strip(rep):
    rep = dict(rep)
    for key in ("seconds", "sources_per_second"):
        rep.pop(key)
    rep.get("plots", {}).pop("seconds", None)
    return rep


@pytest.mark.parametrize("output", [{}, {"source_plots": "flagged", "max_source_plots": 1}])
def test_run_without_the_table_writes_the_same_files_and_report(tmp_path, fixed_date, output):
    wf = parse_workflow(catalog_workflow_data(field={"components": [{"kind": "isrf", "U": 1.0}], "uncertainty": 0.2},
                                              output={"keep_draws": True, **output}))
    mapped = map_catalog(_catalogue(), wf)
    res = run_batch(mapped, wf, output_dir=tmp_path / "a")
    tally = run_batch(mapped, wf, output_dir=tmp_path / "b", return_table=False)
    assert isinstance(tally, RunTally) and tally.n == len(res) == 16
    assert tally.summary() == _legacy_summary(res) == run_summary(res)
    assert tally.skipped and tally.summary()["classes"]
    for name in ("results.ecsv", "results-draws.h5", "results-draws.fits"):
        if (tmp_path / "a" / name).exists():
            assert (tmp_path / "a" / name).read_bytes() == (tmp_path / "b" / name).read_bytes(), name
    ja, jb = (json.loads((tmp_path / d / "results-report.json").read_text()) for d in "ab")
    assert _strip(ja) == _strip(jb)
    ta, tb = ((tmp_path / d / "results-report.txt").read_text().splitlines() for d in "ab")
    keep = [not x.startswith(("time: ", "plot time: ")) for x in ta]
    assert [x for x, k in zip(ta, keep, strict=True) if k] == [x for x, k in zip(tb, keep, strict=True) if k]


def test_needed_columns_follow_the_workflow():
    names = ["name", "T_median", "status", CLASS_COLUMN, "T_eq_p16", "draws_T"]
    wf = parse_workflow(catalog_workflow_data())
    assert batch._needed_columns(wf, names) == []
    wf = parse_workflow(catalog_workflow_data(output={"source_plots": "all"}))
    assert batch._needed_columns(wf, names) == ["name", "status", CLASS_COLUMN, "T_eq_p16"]
    wf = parse_workflow(catalog_workflow_data(output={"plots": True}))
    assert batch._needed_columns(wf, names) == names[:-1]


def test_no_table_needs_an_output_folder():
    wf = parse_workflow(catalog_workflow_data())
    with pytest.raises(ValueError, match="return_table=False needs an output_dir"):
        run_batch(map_catalog(invented_catalog(2, 1), wf), wf, return_table=False)
