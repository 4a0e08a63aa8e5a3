"""Outputs as a transaction (roikit/_outputs.py): manifest, consent, lock, staging and a recoverable switch.

The expected behaviour is the house rule (STYLE.md rule 20) and issue 13's "Lost user files"; common practice
for atomic replacement (write aside, then rename; a journal for multi-file switches), no external source.
"""

from __future__ import annotations

import json
import os
import subprocess
import sys

import pytest

import roikit._outputs as outputs
from roikit._outputs import MANIFEST, PLAN, FolderOutputs, command_line, folder_lock, recover, write_files
from roikit.errors import OutputExistsError, OutputLockedError, RoikitWarning


def _write_set(folder, files: dict, **kwargs):
    with FolderOutputs(folder, writer=kwargs.pop("writer", "roikit run"), **kwargs) as tx:
        for rel, text in files.items():
            (tx.staging / rel).parent.mkdir(parents=True, exist_ok=True)
            (tx.staging / rel).write_text(text)
        return tx.commit()


def _tree(folder) -> dict:
    """Every file under ``folder`` (relative path -> text), roikit's bookkeeping files left out."""
    out = {}
    for root, _, names in os.walk(folder):
        for name in names:
            rel = os.path.relpath(os.path.join(root, name), folder)
            if not rel.startswith(".roikit-"):
                out[rel] = open(os.path.join(root, name)).read()
    return out


OLD = {"report.html": "old report", "figures/a.png": "old a", "figures/b.png": "old b", "tables/t1.md": "old t"}
NEW = {"report.html": "new report", "tables/t1.md": "new t", "tables/t2.md": "new t2"}
IDENTITY = dict(identity={"study_file": "/s/study.toml"}, match=("study_file",))


def test_a_rerun_replaces_its_own_set_and_keeps_user_files(tmp_path):
    out = tmp_path / "results"
    _write_set(out, OLD, **IDENTITY)
    (out / "figures" / "my_drawing.png").write_text("mine")
    (out / "tables" / "notes.txt").write_text("mine too")
    (out / "README.md").write_text("my readme")
    _write_set(out, NEW, **IDENTITY)  # the same writer and study: no consent needed
    # the earlier set's own figures are gone (no figures this time), the user's files are all there
    assert _tree(out) == {**NEW, "figures/my_drawing.png": "mine", "tables/notes.txt": "mine too",
                          "README.md": "my readme"}
    manifest = json.loads((out / MANIFEST).read_text())
    assert sorted(manifest["files"]) == sorted(NEW)
    assert manifest["owner"]["writer"] == "roikit run"
    entry = manifest["files"]["report.html"]
    assert entry["size"] == len("new report") and len(entry["sha256"]) == 64


def test_folders_emptied_by_the_old_set_are_removed(tmp_path):
    out = tmp_path / "results"
    _write_set(out, OLD, **IDENTITY)
    _write_set(out, {"report.html": "x"}, **IDENTITY)
    assert not (out / "figures").exists() and not (out / "tables").exists()


def test_a_foreign_folder_needs_consent_and_keeps_user_files_after_it(tmp_path):
    out = tmp_path / "results"
    (out / "figures").mkdir(parents=True)
    (out / "figures" / "poster.png").write_text("mine")
    with pytest.raises(OutputExistsError, match=r"holds files roikit did not write \(figures\); pass "
                                                r"overwrite=True"):
        _write_set(out, NEW, **IDENTITY)
    with command_line(), pytest.raises(OutputExistsError, match="pass --overwrite"):
        _write_set(out, NEW, **IDENTITY)
    assert _tree(out) == {"figures/poster.png": "mine"}  # nothing written, nothing left behind
    assert sorted(os.listdir(out)) == ["figures"]
    _write_set(out, NEW, overwrite=True, **IDENTITY)
    assert _tree(out) == {**NEW, "figures/poster.png": "mine"}


def test_another_study_or_command_needs_consent_and_its_set_is_replaced_whole(tmp_path):
    out = tmp_path / "results"
    _write_set(out, OLD, **IDENTITY)
    (out / "figures" / "mine.png").write_text("mine")
    other = dict(identity={"study_file": "/s/other.toml"}, match=("study_file",))
    with pytest.raises(OutputExistsError, match=r"outputs of roikit run for /s/study.toml"):
        _write_set(out, NEW, **other)
    with pytest.raises(OutputExistsError, match=r"outputs of roikit run"):
        _write_set(out, NEW, writer="roikit report")
    # with consent, the earlier study's own files (figures a and b) go; the user's file stays
    _write_set(out, NEW, overwrite=True, **other)
    assert _tree(out) == {**NEW, "figures/mine.png": "mine"}


def test_an_output_changed_by_the_user_needs_consent(tmp_path):
    out = tmp_path / "results"
    _write_set(out, OLD, **IDENTITY)
    (out / "tables" / "t1.md").write_text("edited by hand")
    with pytest.raises(OutputExistsError, match=r"tables/t1.md changed since roikit wrote it"):
        _write_set(out, NEW, **IDENTITY)
    assert (out / "tables" / "t1.md").read_text() == "edited by hand"
    _write_set(out, NEW, overwrite=True, **IDENTITY)
    assert (out / "tables" / "t1.md").read_text() == "new t"


def test_a_user_file_with_the_name_of_a_new_output_needs_consent(tmp_path):
    out = tmp_path / "results"
    _write_set(out, OLD, **IDENTITY)
    (out / "tables" / "t2.md").write_text("my own t2")
    with pytest.raises(OutputExistsError, match=r"tables/t2.md was not written by roikit"):
        _write_set(out, NEW, **IDENTITY)
    assert _tree(out) == {**OLD, "tables/t2.md": "my own t2"}  # the old set is intact


def test_a_failure_before_the_switch_leaves_the_old_set(tmp_path):
    out = tmp_path / "results"
    _write_set(out, OLD, **IDENTITY)
    with pytest.raises(RuntimeError, match="analysis failed"):
        with FolderOutputs(out, writer="roikit run", **IDENTITY) as tx:
            (tx.staging / "report.html").write_text("half")
            raise RuntimeError("analysis failed")
    assert _tree(out) == OLD
    assert not [n for n in os.listdir(out) if n.startswith(".roikit-") and n != MANIFEST]


@pytest.mark.parametrize("fail_at", range(1, 10))
def test_a_crash_between_renames_is_finished_by_the_next_run(tmp_path, monkeypatch, fail_at):
    """A crash at any rename of the switch: the plan file marks it, and the next writer rolls it forward."""
    out = tmp_path / "results"
    _write_set(out, OLD, **IDENTITY)
    (out / "figures" / "mine.png").write_text("mine")
    real_replace = os.replace
    calls = []

    def crashing_replace(src, dst):
        calls.append((src, dst))
        if len(calls) == fail_at:
            raise OSError(5, "Input/output error (simulated crash)", str(src))
        return real_replace(src, dst)

    monkeypatch.setattr(outputs.os, "replace", crashing_replace)
    with pytest.raises(Exception):
        _write_set(out, NEW, **IDENTITY)
    monkeypatch.setattr(outputs.os, "replace", real_replace)
    if (out / PLAN).exists():
        # detected: the plan is there, the lock is not; the next writer finishes the switch first
        assert not (out / ".roikit-lock").exists()
        with pytest.warns(RoikitWarning, match="finished replacing outputs that an interrupted earlier run"):
            with folder_lock(out, "test"):
                assert recover(out)
        assert _tree(out) == {**NEW, "figures/mine.png": "mine"}
        assert sorted(json.loads((out / MANIFEST).read_text())["files"]) == sorted(NEW)
    else:
        # the crash came before the commit point (writing the plan): the old set is untouched
        assert _tree(out) == {**OLD, "figures/mine.png": "mine"}
    assert not [n for n in os.listdir(out) if n.startswith((".roikit-staging", ".roikit-trash"))]
    # and an ordinary rerun works either way
    _write_set(out, NEW, **IDENTITY)
    assert _tree(out) == {**NEW, "figures/mine.png": "mine"}


def test_a_second_writer_is_refused_while_the_lock_is_held(tmp_path):
    out = tmp_path / "results"
    out.mkdir()
    with folder_lock(out, "roikit run"):
        with pytest.raises(OutputLockedError, match=rf"{out}: another roikit command \(roikit run, process "
                                                    rf"{os.getpid()}"):
            _write_set(out, NEW, **IDENTITY)
        with pytest.raises(OutputLockedError):  # a table writer waits, then gives up
            write_files(out, {"values.tsv": b"x"}, writer="roikit extract", wait=0.3)
    _write_set(out, NEW, **IDENTITY)  # released
    assert not (out / ".roikit-lock").exists()


def test_a_stale_lock_of_a_dead_process_is_removed(tmp_path):
    out = tmp_path / "results"
    out.mkdir()
    dead = subprocess.Popen([sys.executable, "-c", "pass"])
    dead.wait()  # reaped: its process id no longer exists (unless reused, which the start time catches)
    (out / ".roikit-lock").write_text(json.dumps({"pid": dead.pid, "host": os.uname().nodename,
                                                  "command": "roikit run", "since": "earlier"}))
    _write_set(out, NEW, **IDENTITY)
    assert _tree(out) == NEW and not (out / ".roikit-lock").exists()


def test_a_lock_whose_process_id_was_reused_is_stale(tmp_path):
    out = tmp_path / "results"
    out.mkdir()
    started = outputs._start_time(os.getpid())
    if started is None:
        pytest.skip("no /proc here: process start times unknown")
    (out / ".roikit-lock").write_text(json.dumps({"pid": os.getpid(), "host": os.uname().nodename,
                                                  "started_ticks": str(int(started) - 1), "command": "roikit run"}))
    _write_set(out, NEW, **IDENTITY)
    assert _tree(out) == NEW


def test_a_malformed_manifest_is_treated_as_foreign_with_a_warning(tmp_path):
    out = tmp_path / "results"
    _write_set(out, OLD, **IDENTITY)
    (out / MANIFEST).write_text(json.dumps({"files": ["not", "a", "table"]}))
    with pytest.warns(RoikitWarning, match="malformed manifest"), pytest.raises(OutputExistsError):
        _write_set(out, NEW, **IDENTITY)


def test_files_rerun_without_consent_and_a_foreign_file_needs_it(tmp_path):
    write_files(tmp_path, {"v.tsv": b"1", "v.json": b"{}"}, writer="roikit extract")
    write_files(tmp_path, {"v.tsv": b"2", "v.json": b"{}"}, writer="roikit extract")
    assert (tmp_path / "v.tsv").read_bytes() == b"2"
    # another command's file is not its own
    with pytest.raises(OutputExistsError, match="not an unchanged output of roikit stats"):
        write_files(tmp_path, {"v.tsv": b"3"}, writer="roikit stats")
    # a folder-owner's rerun keeps the single files of another command (they are not its set)
    manifest = json.loads((tmp_path / MANIFEST).read_text())
    assert {e["writer"] for e in manifest["files"].values()} == {"roikit extract"}


def test_a_folder_written_before_manifests_is_recognised_from_its_provenance(tmp_path):
    out = tmp_path / "results"
    (out / "figures").mkdir(parents=True)
    old = {"report.html": "old report", "figures/a.png": "old a", "figures/edited.png": "as written"}
    for rel, text in old.items():
        (out / rel).write_text(text)
    outputs_list = [{"path": rel, "sha256": outputs._sha256(out / rel)} for rel in old]
    (out / "figures" / "edited.png").write_text("edited by the user since")
    (out / "figures" / "mine.png").write_text("mine")
    (out / "provenance.json").write_text(json.dumps({"kind": "roikit run", "outputs": outputs_list,
                                                     "run": {"study_file": "/s/study.toml"}}))
    # the same study: a rerun without consent; its unchanged outputs are replaced, the rest is kept
    _write_set(out, NEW, **IDENTITY)
    assert _tree(out) == {**NEW, "figures/edited.png": "edited by the user since", "figures/mine.png": "mine"}
