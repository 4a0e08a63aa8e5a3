"""The report's figures drawn in worker processes: the same files, in the same order, as drawn one by one here."""

from __future__ import annotations

import multiprocessing as mp
import re
import threading
import time
import warnings
from functools import partial

import pandas as pd
import pytest

from roikit.errors import UsageError
from roikit.reporting import _parallel, write_report
from roikit.reporting._parallel import OrderedTasks
from roikit.reporting.report import _draw_figure, _FigureTask

FORMATS = ("pdf", "svg", "png")


def _report(values, results, participants, out, n_jobs):
    with warnings.catch_warnings(record=True) as caught:
        warnings.simplefilter("always")
        written = write_report(values, results, participants=participants, out=out, figure_formats=FORMATS,
                               n_jobs=n_jobs)
    return written, [(w.category, str(w.message).replace(str(out), "OUT")) for w in caught]


def _files(folder):
    """Every output's bytes; the page's and provenance's time stamps (and Word's) are the only differences."""
    files = {}
    for path in sorted(folder.rglob("*")):
        if not path.is_file() or path.name in (".roikit-manifest.json", "provenance.json") or path.suffix == ".docx":
            continue
        data = path.read_bytes()
        if path.name == "report.html":
            data = re.sub(rb"Written by roikit \S+ on [^<]+\.", b"", data)
        files[path.relative_to(folder).as_posix()] = data
    return files


@pytest.fixture
def some_results(results_by_design):
    return pd.concat([results_by_design[d].assign(analysis=k) for k, d in
                      enumerate(("one-sample", "two-group", "glm"), start=1)], ignore_index=True)


def test_worker_processes_write_the_same_files_as_this_process(values, some_results, participants, tmp_path):
    serial, serial_warnings = _report(values, some_results, participants, tmp_path / "serial", 1)
    assert _parallel.fork_is_safe()  # pytest runs no other non-daemon thread: workers are forked
    parallel, parallel_warnings = _report(values, some_results, participants, tmp_path / "parallel", 2)
    a, b = _files(tmp_path / "serial"), _files(tmp_path / "parallel")
    assert sorted(a) == sorted(b)
    assert [k for k in a if a[k] != b[k]] == []
    # every format of every figure, in the same order (index.tsv and the figure numbers follow it)
    n_figures = len([p for p in serial["figures"] if p.suffix == ".png"])
    assert n_figures >= 6 and {p.suffix for p in serial["figures"]} == {".pdf", ".svg", ".png"}
    assert [p.name for p in parallel["figures"]] == [p.name for p in serial["figures"]]
    assert parallel_warnings == serial_warnings


def test_workers_started_by_a_forkserver_write_the_same_files(values, results_by_design, participants, tmp_path,
                                                              monkeypatch):
    if "forkserver" not in mp.get_all_start_methods():
        pytest.skip("no forkserver start method on this platform")
    results = results_by_design["two-group"]
    _report(values, results, participants, tmp_path / "serial", 1)
    # what runs when fork is not safe (another thread running) or not available: pickled tasks, the parent's
    # matplotlib settings sent along
    monkeypatch.setattr(_parallel, "_start_method", lambda: "forkserver")
    _report(values, results, participants, tmp_path / "forkserver", 2)
    a, b = _files(tmp_path / "serial"), _files(tmp_path / "forkserver")
    assert sorted(a) == sorted(b) and [k for k in a if a[k] != b[k]] == []


def test_default_workers_follow_the_cores_and_stay_in_this_process_when_fork_is_unsafe(monkeypatch):
    monkeypatch.setattr(_parallel, "usable_cores", lambda: 4)
    assert _parallel.workers(10, None) == 4 and _parallel.workers(3, None) == 3 and _parallel.workers(10, 1) == 1
    stop = threading.Event()
    busy = threading.Thread(target=stop.wait, daemon=False)  # a thread the interpreter waits for
    busy.start()
    try:
        assert not _parallel.fork_is_safe()
        assert _parallel.workers(10, None) == 1  # default: draw here
        assert _parallel.workers(10, 2) == 2  # asked for: a forkserver's workers
        assert _parallel._start_method() in ("forkserver", "spawn")
    finally:
        stop.set()
        busy.join()
    monkeypatch.setattr(_parallel.sys, "platform", "darwin")
    assert not _parallel.fork_is_safe() and _parallel.workers(10, None) == 1


# module-level: tasks travel to worker processes
def _warn_then_draw(kind):
    from matplotlib.figure import Figure

    if kind == "refused":
        raise UsageError("the column 'age' is not numeric")
    warnings.warn(f"drawing {kind}", UserWarning)
    fig = Figure(figsize=(2, 1))
    fig.add_subplot().plot([0, 1], [1, 0])
    return [fig, fig] if kind == "two pages" else fig


def test_warnings_refusals_and_pages_come_back_from_the_workers_in_order(tmp_path):
    tasks = [_FigureTask(partial(_warn_then_draw, kind), f"a1-x_{k}", f"figure {k}")
             for k, kind in enumerate(("one page", "refused", "two pages"))]
    with OrderedTasks(_draw_figure, tasks, (tmp_path, ("png",), False), n_jobs=2) as drawn:
        assert drawn.parallel
        done = list(drawn.results())
    assert [d["error"] for d in done] == [None, "the column 'age' is not numeric", None]
    assert [[p["name"] for p in d["pages"]] for d in done] == [["a1-x_0"], [], ["a1-x_2_p1", "a1-x_2_p2"]]
    assert sorted(p.name for p in tmp_path.iterdir()) == ["a1-x_0.png", "a1-x_2_p1.png", "a1-x_2_p2.png"]
    assert [[(c, str(m)) for c, m, _, _ in d["warnings"]] for d in done] == [
        [(UserWarning, "drawing one page")], [], [(UserWarning, "drawing two pages")]]
    assert done[0]["pages"][0]["width_mm"] == pytest.approx(50.8)


def _sleep(seconds, *_):
    time.sleep(seconds)
    return seconds


def test_leaving_early_stops_the_workers_at_once():
    with pytest.raises(KeyboardInterrupt):
        with OrderedTasks(_sleep, [60, 60, 60], n_jobs=2) as running:
            processes = list(running._pool._processes.values())
            raise KeyboardInterrupt
    from helpers import process_ended

    for proc in processes:  # terminated, not left to finish their minute of work
        assert process_ended(proc.pid)


def test_a_worker_error_reaches_the_caller():
    with pytest.raises(ZeroDivisionError), OrderedTasks(_divide, [1, 0, 2], n_jobs=2) as running:
        list(running.results())


def _divide(x):
    return 1 / x
