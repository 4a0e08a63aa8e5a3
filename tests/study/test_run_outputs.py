"""`roikit run` outputs as a transaction and the cache under interruption (issue 13 "Lost user files", issue 14
item 4): user files survive, reruns need no consent, a second run is refused, a crash is finished later, a malformed
cache is discarded, an interrupt keeps the finished maps, workers leave with their parent."""

from __future__ import annotations

import contextlib
import io
import json
import os
import signal
import subprocess
import sys
import textwrap
import time

import pytest

import roikit._outputs as outputs
import roikit.extraction as extraction
from roikit._outputs import MANIFEST, PLAN, folder_lock
from roikit.cli import main
from roikit.errors import OutputExistsError, OutputLockedError, OutputWriteError, RoikitWarning
from roikit.study import run_study


def _cli(args):
    stdout, stderr = io.StringIO(), io.StringIO()
    with contextlib.redirect_stdout(stdout), contextlib.redirect_stderr(stderr):
        status = main(args)
    return status, stdout.getvalue(), stderr.getvalue()


def _cache(study_dir):
    return json.loads((study_dir / "results" / ".cache" / "extraction.json").read_text())


def test_user_files_in_figures_and_tables_survive_overwrite(study_dir):
    out = study_dir / "results"
    run_study(study_dir / "study.toml", figures=False)
    (out / "figures").mkdir(exist_ok=True)
    (out / "figures" / "my_poster.png").write_bytes(b"mine")
    (out / "tables" / "my_notes.txt").write_text("mine")
    (out / "draft.docx").write_bytes(b"mine")
    for overwrite in (False, True):
        run_study(study_dir / "study.toml", overwrite=overwrite, figures=False)
        assert (out / "figures" / "my_poster.png").read_bytes() == b"mine"
        assert (out / "tables" / "my_notes.txt").read_text() == "mine"
        assert (out / "draft.docx").read_bytes() == b"mine"


def test_overwrite_without_figures_removes_an_earlier_runs_figures(study_dir):
    out = study_dir / "results"
    other = study_dir / "other.toml"
    other.write_text((study_dir / "study.toml").read_text().replace("tiny test copy", "another study"))
    run_study(other, out=out, figures=True, figure_formats=("png",))
    drawn = sorted(p.name for p in (out / "figures").iterdir())
    assert drawn
    (out / "figures" / "mine.png").write_bytes(b"mine")
    with pytest.raises(OutputExistsError, match="outputs of roikit run for .*other.toml"):
        run_study(study_dir / "study.toml", out=out, figures=False)
    run_study(study_dir / "study.toml", out=out, overwrite=True, figures=False)
    # the earlier, different run's figures are gone; the user's file is not
    assert sorted(p.name for p in (out / "figures").iterdir()) == ["mine.png"]
    assert "another study" not in (out / "report.html").read_text()
    manifest = json.loads((out / MANIFEST).read_text())
    assert manifest["owner"]["identity"]["study_file"] == os.fspath(study_dir / "study.toml")
    assert not [f for f in manifest["files"] if f.startswith("figures/")]
    # every file the manifest lists is there, with the size it records
    for rel, entry in manifest["files"].items():
        assert os.path.getsize(out / rel) == entry["size"], rel


def test_a_second_concurrent_run_is_refused(study_dir):
    out = study_dir / "results"
    out.mkdir()
    with folder_lock(out, "roikit run"):  # another run holds the folder
        with pytest.raises(OutputLockedError, match=r"another roikit command \(roikit run, process \d+"):
            run_study(study_dir / "study.toml", figures=False)
        status, _, err = _cli(["run", str(study_dir / "study.toml"), "--no-figures"])
        assert status == 1 and err.count("\n") == 1 and "is writing into this folder" in err
    assert not (out / "report.html").exists()
    run_study(study_dir / "study.toml", figures=False)  # released: runs


def test_a_crash_between_output_renames_is_finished_by_the_next_run(study_dir, monkeypatch):
    out = study_dir / "results"
    first = run_study(study_dir / "study.toml", figures=False)
    text = (study_dir / "study.toml").read_text()
    (study_dir / "study.toml").write_text(text.replace('contrast = "novel"\n\n[[analysis]]',
                                                       'contrast = "familiar"\n\n[[analysis]]', 1))
    real_replace = os.replace
    calls = []

    def crashing(src, dst):
        if (out / PLAN).exists():  # the switch has begun (the plan is its commit point)
            calls.append(dst)
            if len(calls) == 3:  # crash among the renames
                raise OSError(5, "Input/output error (simulated crash)", str(src))
        return real_replace(src, dst)

    monkeypatch.setattr(outputs.os, "replace", crashing)
    with pytest.raises(OutputWriteError, match="the next roikit run into this folder finishes it"):
        run_study(study_dir / "study.toml", figures=False)
    monkeypatch.setattr(outputs.os, "replace", real_replace)
    assert (out / PLAN).exists()  # detected: the folder says it is mid-switch
    assert not (out / ".roikit-lock").exists()
    # the next run finishes the switch first (warning), then writes its own set
    with pytest.warns(RoikitWarning, match="finished replacing outputs that an interrupted earlier run"):
        again = run_study(study_dir / "study.toml", figures=False)
    assert not (out / PLAN).exists()
    assert again.reused == 16 - 8 or again.reused >= 8
    manifest = json.loads((out / MANIFEST).read_text())
    for rel, entry in manifest["files"].items():
        assert os.path.getsize(out / rel) == entry["size"], rel
    table = (out / "group_results.tsv").read_text()
    assert "familiar" in table and first.results["contrast"].eq("novel").all()
    assert not [n for n in os.listdir(out) if n.startswith((".roikit-staging", ".roikit-trash"))]


@pytest.mark.parametrize("content", [
    {"format": 2, "fingerprint": "x", "maps": [1, 2]},
    [1, 2, 3],
    {"maps": {}},
])
def test_a_malformed_cache_is_discarded_with_a_warning(study_dir, content):
    run_study(study_dir / "study.toml", figures=False)
    (study_dir / "results" / ".cache" / "extraction.json").write_text(json.dumps(content))
    with pytest.warns(RoikitWarning, match="malformed extraction cache"):
        run = run_study(study_dir / "study.toml", figures=False)
    assert run.extracted == 8 and run.reused == 0


def test_malformed_cache_entries_are_discarded_with_a_warning(study_dir):
    run_study(study_dir / "study.toml", figures=False)
    cache = _cache(study_dir)
    key = sorted(cache["maps"])[0]
    cache["maps"][key]["value"] = ["text", 1, 2, 3]
    (study_dir / "results" / ".cache" / "extraction.json").write_text(json.dumps(cache))
    with pytest.warns(RoikitWarning, match="1 malformed cache entries discarded"):
        run = run_study(study_dir / "study.toml", figures=False)
    assert run.extracted == 1 and run.reused == 7
    status, _, err = _cli(["run", str(study_dir / "study.toml"), "--quiet", "--no-figures"])
    assert status == 0 and "Traceback" not in err


def _interrupt_after(monkeypatch, n_files: int):
    original = extraction._fetch_flat  # every map file extraction reads goes through it, in order
    count = [0]

    def reader(header, volume):
        if count[0] == n_files:
            raise KeyboardInterrupt
        count[0] += 1
        return original(header, volume)

    monkeypatch.setattr(extraction, "_fetch_flat", reader)


def test_an_interrupted_extraction_keeps_the_finished_maps(study_dir, monkeypatch):
    _interrupt_after(monkeypatch, 6)  # 3 maps (effect + variance) finished, the 4th interrupted
    with pytest.raises(KeyboardInterrupt, match="3 newly extracted maps of 8 kept in the cache"):
        run_study(study_dir / "study.toml", figures=False)
    assert len(_cache(study_dir)["maps"]) == 3
    assert not (study_dir / "results" / "report.html").exists()
    monkeypatch.undo()
    run = run_study(study_dir / "study.toml", figures=False)
    assert run.extracted == 5 and run.reused == 3


def test_the_command_line_says_one_line_and_exits_130_on_interrupt(study_dir, monkeypatch):
    _interrupt_after(monkeypatch, 4)
    status, out, err = _cli(["run", str(study_dir / "study.toml"), "--no-figures", "--quiet"])
    assert status == 130 and out == ""
    assert err.count("\n") == 1 and err.startswith("roikit run: interrupted (2 newly extracted maps of 8 kept")
    monkeypatch.undo()
    status, out, err = _cli(["run", str(study_dir / "study.toml"), "--no-figures"])
    assert status == 0 and "(6 extracted, 2 from the cache" in out


def test_maps_that_failed_do_not_lose_the_others_from_the_cache(study_dir):
    path = study_dir / "maps" / "sub-05_contrast-novel_effect.nii.gz"
    path.write_bytes(path.read_bytes()[: os.path.getsize(path) // 2])  # header fine, data cut short
    status, _, err = _cli(["run", str(study_dir / "study.toml"), "--quiet", "--no-figures"])
    assert status == 1 and "sub-05_contrast-novel_effect.nii.gz" in err
    assert len(_cache(study_dir)["maps"]) == 7


def _alive(pid: int) -> bool:
    try:
        with open(f"/proc/{pid}/stat") as fh:
            return fh.read().rsplit(")", 1)[1].split()[0] != "Z"  # a zombie has exited
    except FileNotFoundError:
        return False


def _children(pid: int) -> list[int]:
    found = []
    for name in os.listdir("/proc"):
        if name.isdigit():
            try:
                with open(f"/proc/{name}/stat") as fh:
                    if int(fh.read().rsplit(")", 1)[1].split()[1]) == pid:
                        found.append(int(name))
            except (FileNotFoundError, ProcessLookupError, IndexError, ValueError):
                pass
    return found


@pytest.mark.skipif(not sys.platform.startswith("linux"), reason="reads /proc to find the workers")
def test_workers_exit_when_the_parent_is_killed(study_dir, tmp_path):
    """Issue 13: SIGKILL of `roikit run --jobs 2` left two workers blocked on their task pipe forever."""
    script = tmp_path / "parent.py"
    script.write_text(textwrap.dedent(f"""
        import sys, time
        import roikit.extraction as extraction
        from roikit.extraction import extract, find_maps
        from roikit.regions import RegionSet, Sphere

        def slow(tasks, *args):  # a worker busy for a long time (inherited by the forked workers)
            time.sleep(600)

        extraction._run_tasks = slow
        maps = find_maps({os.fspath(study_dir / "maps" / "sub-{subject}_contrast-{contrast}_effect.nii.gz")!r})
        print("ready", flush=True)
        extract(maps, RegionSet([Sphere("s", (0, 0, 0), 4)]), n_jobs=2, progress=False)
    """))
    env = dict(os.environ, PYTHONPATH=os.pathsep.join([os.getcwd(), os.environ.get("PYTHONPATH", "")]))
    parent = subprocess.Popen([sys.executable, str(script)], stdout=subprocess.PIPE, env=env)
    workers: list[int] = []
    try:
        assert parent.stdout.readline().strip() == b"ready"
        deadline = time.monotonic() + 30
        while time.monotonic() < deadline and len(workers) < 2:
            time.sleep(0.2)
            workers = [p for p in _children(parent.pid) if _alive(p)]
        assert len(workers) >= 2, "the pool did not start"
        parent.send_signal(signal.SIGKILL)
        parent.wait()
        # a bound, not a timing: the workers check on their parent every 0.5 s (and Linux signals them at once)
        deadline = time.monotonic() + 10
        while time.monotonic() < deadline and any(_alive(p) for p in workers):
            time.sleep(0.1)
        assert not [p for p in workers if _alive(p)]
    finally:
        if parent.poll() is None:
            parent.kill()
            parent.wait()
        for p in workers:  # never leave a worker behind, even when the test fails
            if _alive(p):
                with contextlib.suppress(ProcessLookupError):
                    os.kill(p, signal.SIGKILL)
