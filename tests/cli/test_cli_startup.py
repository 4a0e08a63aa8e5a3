"""`roikit --help` and `--version` import no numerical library (they answer in well under 0.3 s; timed in
benchmarks/bench_startup.py, never here)."""

from __future__ import annotations

import subprocess
import sys

import roikit.cli._demo as cli_demo
from roikit.demo import DEFAULT_SEED


def _modules_after(args: list[str]) -> set[str]:
    code = ("import sys, runpy\nsys.argv = ['roikit'] + %r\n"
            "try:\n    runpy.run_module('roikit', run_name='__main__')\nexcept SystemExit:\n    pass\n"
            "print('\\n'.join(sorted(sys.modules)), file=sys.stderr)" % (args,))
    done = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    return set(done.stderr.split())


def test_help_and_version_import_no_numerical_library():
    for args in (["--version"], ["--help"], []):
        loaded = _modules_after(args)
        heavy = {m for m in loaded if m.split(".")[0] in ("numpy", "pandas", "scipy", "nibabel", "matplotlib",
                                                          "dask", "distributed")}
        assert not heavy, (args, sorted(heavy)[:5])


def test_commands_that_take_a_scheduler_import_dask_only_when_one_is_given():
    for args in (["extract", "--help"], ["stats", "--help"], ["run", "--help"]):
        loaded = _modules_after(args)
        dask = {m for m in loaded if m.split(".")[0] in ("dask", "distributed")}
        assert not dask, (args, sorted(dask)[:5])


def test_command_help_still_lists_the_designs(capsys):
    from roikit.cli import main

    try:
        main(["stats", "--help"])
    except SystemExit:
        pass
    assert "two-group" in capsys.readouterr().out


def test_demo_seed_in_the_command_line_is_the_generator_s():
    assert cli_demo.DEFAULT_SEED == DEFAULT_SEED
