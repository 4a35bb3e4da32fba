"""Checkpoint bookkeeping: which inputs the resume digest covers, the lock, the part journal."""

import os

import pytest
from invented import catalog_workflow_data, invented_catalog

from sedtemp.errors import ConfigError
from sedtemp.pipeline import NON_RESULT_KEYS, map_catalog, parse_workflow
from sedtemp.pipeline.checkpoints import (
    JOURNAL,
    OutputLock,
    RunState,
    input_digests,
    referenced_files,
)


def _digest(**sections):
    wf = parse_workflow(catalog_workflow_data(**sections))
    return input_digests(wf, map_catalog(invented_catalog(3, 1), wf))


def test_non_result_keys_leave_the_digest_unchanged():
    base = _digest()["workflow"]
    same = _digest(run={"workers": 2, "executor": "process", "chunk_size": 7, "scheduler": "x:1"},
                   output={"directory": "elsewhere", "name": "other", "format": "csv", "plots": True,
                           "source_plots": "all", "max_source_plots": 3})
    assert same["workflow"] == base
    assert {k for _, k in NON_RESULT_KEYS} >= {"workers", "executor", "chunk_size", "plots"}


@pytest.mark.parametrize("sections", [{"run": {"seed": 6}}, {"fit": {"n_T": 31}}, {"output": {"n_keep": 40}},
                                      {"catalog": {"distance": "401 pc"}}])
def test_result_keys_change_the_digest(sections):
    assert _digest(**sections)["workflow"] != _digest()["workflow"]


def test_referenced_files_are_the_band_responses(tmp_path):
    resp = tmp_path / "r.dat"
    resp.write_text("1.1e12 0.5\n1.2e12 1.0\n1.3e12 0.5\n")
    data = catalog_workflow_data()
    data["bands"]["b250"] = {"flux": "F250", "error": "E250", "response": str(resp)}
    wf = parse_workflow(data)
    assert referenced_files(wf) == [resp]
    before = input_digests(wf, map_catalog(invented_catalog(2, 1), wf))["files"][str(resp)]
    resp.write_text("1.1e12 0.5\n1.2e12 1.0\n1.3e12 0.6\n")
    assert input_digests(wf, map_catalog(invented_catalog(2, 1), wf))["files"][str(resp)] != before


def test_second_lock_in_the_same_process_refused(tmp_path):
    match = rf"is in use by another sedtemp run \(pid {os.getpid()} on "
    with OutputLock(tmp_path), pytest.raises(ConfigError, match=match):
        OutputLock(tmp_path).__enter__()
    with OutputLock(tmp_path) as again:  # released on exit: free again, and not stale
        assert again.stale is None


def test_journal_line_torn_by_a_kill_is_ignored(tmp_path):
    wf = parse_workflow(catalog_workflow_data())
    m = map_catalog(invented_catalog(3, 1), wf)
    state = RunState(tmp_path, wf, m)
    from sedtemp.pipeline.stages import process_chunk

    name = state.write_part(process_chunk(wf, m, stages=("fit",)))
    with open(tmp_path / "parts" / JOURNAL, "a") as fh:
        fh.write("part-000000009-abc 12")  # half a line
    again = RunState(tmp_path, wf, m)
    assert list(again.parts) == [name]
    assert [len(t) for t in again.read_parts()] == [3] and again.damaged == []
