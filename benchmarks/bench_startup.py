"""Start-up time of `roikit --version` and `roikit --help` (median of N runs, seconds).

    python benchmarks/bench_startup.py [N]
"""

from __future__ import annotations

import statistics
import subprocess
import sys
import time


def main(n: int = 20) -> None:
    for args in (["--version"], ["--help"]):
        times = []
        for _ in range(n):
            t0 = time.perf_counter()
            subprocess.run([sys.executable, "-m", "roikit", *args], capture_output=True, check=True)
            times.append(time.perf_counter() - t0)
        print(f"roikit {' '.join(args)}: median {statistics.median(times):.3f} s, max {max(times):.3f} s "
              f"({n} runs)")


if __name__ == "__main__":
    main(int(sys.argv[1]) if len(sys.argv) > 1 else 20)
