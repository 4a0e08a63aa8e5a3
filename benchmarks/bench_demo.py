"""Demo benchmark: time of `roikit demo` (generation + pipeline) and size of the invented study.

Targets: generation plus the whole pipeline under 60 s on this machine, study under 120 MB (issue 3); the
demo end to end under 15 s, with the report's figures drawn in worker processes (issue 19).
Runs the command in a fresh subprocess per repeat (so imports count, as for a user), then times the
generator alone in this process, then the report of the demo's results with its figures drawn in this
process (n_jobs=1) and in worker processes (default). Prints medians and the load average (the machine may
be shared: compare on a quiet machine) and writes benchmarks/results/bench_demo.json.

    python benchmarks/bench_demo.py [--repeats 3]
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import shutil
import statistics
import subprocess
import sys
import tempfile
import time
from pathlib import Path

HERE = Path(__file__).resolve().parent
RESULTS = HERE / "results"


def _size(folder: Path) -> int:
    return sum(p.stat().st_size for p in folder.rglob("*") if p.is_file())


def _report(demo: Path, out: Path, n_jobs) -> None:
    import warnings

    from roikit._tables import read_sidecar, read_table
    from roikit.reporting import write_report

    results = demo / "results"
    values = read_table(results / "region_values.tsv")
    values.attrs["roikit"] = read_sidecar(results / "region_values.tsv").get("provenance", {})  # draws the regions
    with warnings.catch_warnings():
        warnings.simplefilter("ignore")
        write_report(values, read_table(results / "group_results.tsv"),
                     participants=demo / "study" / "participants.tsv", out=out, figure_formats=("png",),
                     value_label="Parameter estimate (a.u.)", n_jobs=n_jobs)


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=3)
    args = parser.parse_args(argv)

    from roikit.demo import make_study, run_demo
    from roikit.reporting._parallel import workers as _workers

    workers = _workers(10**6, None)

    command, in_process, generation, extraction, statistics_, report, sizes = [], [], [], [], [], [], []
    report_serial, report_parallel = [], []
    load_before = os.getloadavg()
    for _ in range(args.repeats):
        tmp = Path(tempfile.mkdtemp(prefix="bench-demo-"))
        try:
            t0 = time.perf_counter()
            subprocess.run([sys.executable, "-m", "roikit", "demo", "--out", str(tmp / "cli"), "--quiet"],
                           check=True, stdout=subprocess.DEVNULL)
            command.append(time.perf_counter() - t0)
            sizes.append(_size(tmp / "cli" / "study"))

            t0 = time.perf_counter()
            run = run_demo(tmp / "api", progress=False)
            in_process.append(time.perf_counter() - t0)
            generation.append(run.seconds["generate the study"])
            extraction.append(run.seconds["extract region values"])
            statistics_.append(run.seconds["group statistics"])
            report.append(run.seconds["report"])

            t0 = time.perf_counter()
            make_study(tmp / "gen-only", n_per_group=16)
            generation.append(time.perf_counter() - t0)

            # the report alone (the demo's PNG figures), figures drawn here one by one, then in worker processes
            for jobs, times in ((1, report_serial), (None, report_parallel)):
                t0 = time.perf_counter()
                _report(tmp / "api", tmp / f"report-{jobs}", jobs)
                times.append(time.perf_counter() - t0)
        finally:
            shutil.rmtree(tmp, ignore_errors=True)

    result = {
        "machine": {"python": platform.python_version(), "cpus": os.cpu_count(), "platform": platform.platform()},
        "repeats": args.repeats,
        "median_seconds": {
            "roikit demo command (subprocess, incl. imports)": statistics.median(command),
            "run_demo in process": statistics.median(in_process),
            "generation (make_study)": statistics.median(generation),
            "extraction step": statistics.median(extraction),
            "group statistics step (six analyses)": statistics.median(statistics_),
            "report step (PNG figures)": statistics.median(report),
            "report alone, figures in this process (n_jobs=1)": statistics.median(report_serial),
            "report alone, figures in worker processes": statistics.median(report_parallel),
        },
        "all_seconds": {"command": command, "run_demo": in_process, "generation": generation,
                        "extraction": extraction, "statistics": statistics_, "report": report,
                        "report_serial": report_serial, "report_parallel": report_parallel},
        "figure_workers": workers,
        "load_average_before": load_before,
        "load_average_after": os.getloadavg(),
        "study_megabytes": statistics.median(sizes) / 1e6,
    }
    print(f"roikit demo benchmark ({args.repeats} repeats, medians)")
    for name, value in result["median_seconds"].items():
        print(f"  {name:<48} {value:7.2f} s")
    print(f"  {'study size':<48} {result['study_megabytes']:7.1f} MB")
    print(f"  figure workers (default): {workers}; load average (1, 5, 15 min) before "
          f"{', '.join(f'{x:.2f}' for x in load_before)}, after {', '.join(f'{x:.2f}' for x in os.getloadavg())}")
    RESULTS.mkdir(parents=True, exist_ok=True)
    (RESULTS / "bench_demo.json").write_text(json.dumps(result, indent=2) + "\n")
    return 0


if __name__ == "__main__":
    sys.exit(main())
