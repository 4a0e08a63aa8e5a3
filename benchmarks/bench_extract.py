"""Extraction benchmark: throughput against plain decompression, a per-region mask loop, and memory.

Makes its own synthetic data (cached in benchmarks/results/data): an MNI-like 2 mm grid
(91 x 109 x 91), an ellipsoidal brain with zeros outside, a 400-region parcellation (nearest of 400
random seeds inside the brain), and N float32 maps written as gzip level-6 NIfTI.

Prints a table of medians and writes benchmarks/results/bench_extract.json.

    python benchmarks/bench_extract.py [--maps 200] [--regions 400] [--repeats 3]
"""

from __future__ import annotations

import argparse
import gzip
import json
import os
import platform
import statistics
import subprocess
import sys
import time
import zlib
from pathlib import Path

import nibabel as nib
import numpy as np
import pandas as pd

HERE = Path(__file__).resolve().parent
RESULTS = HERE / "results"
SHAPE = (91, 109, 91)
AFFINE = np.array([[-2.0, 0, 0, 90], [0, 2, 0, -126], [0, 0, 2, -72], [0, 0, 0, 1]])


def make_data(n_maps: int, n_regions: int, folder: Path) -> tuple[Path, Path, list[Path]]:
    folder.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(0)
    ijk = np.indices(SHAPE).reshape(3, -1).T.astype(np.float32)
    centre = (np.array(SHAPE) - 1) / 2
    brain = (((ijk - centre) / (np.array(SHAPE) * 0.42)) ** 2).sum(axis=1) <= 1.0
    atlas_path = folder / f"atlas-{n_regions}.nii.gz"
    labels_path = folder / f"atlas-{n_regions}.tsv"
    if not atlas_path.exists():
        inside = np.flatnonzero(brain)
        seeds = ijk[rng.choice(inside, n_regions, replace=False)]
        labels = np.zeros(len(ijk), dtype=np.int16)
        from scipy.spatial import cKDTree

        labels[inside] = cKDTree(seeds).query(ijk[inside])[1] + 1
        nib.save(nib.Nifti1Image(labels.reshape(SHAPE, order="C"), AFFINE), atlas_path)
        pd.DataFrame({"index": np.arange(1, n_regions + 1),
                      "name": [f"parcel {k:03d}" for k in range(1, n_regions + 1)]}).to_csv(
            labels_path, sep="\t", index=False)
    paths = []
    template = rng.normal(size=SHAPE).astype(np.float32)
    mask = brain.reshape(SHAPE, order="C")
    for k in range(n_maps):
        p = folder / f"sub-{k:04d}_contrast-task_effect.nii.gz"
        if not p.exists():
            data = (template * rng.uniform(0.5, 1.5) + rng.normal(size=SHAPE).astype(np.float32)) * mask
            img = nib.Nifti1Image(data.astype(np.float32), AFFINE)
            p.write_bytes(gzip.compress(img.to_bytes(), compresslevel=6))
        paths.append(p)
    return atlas_path, labels_path, paths


def time_per_map(fn, paths, repeats) -> float:
    """Median over repeats of (total seconds / number of maps), in ms."""
    runs = []
    for _ in range(repeats):
        t = time.perf_counter()
        fn(paths)
        runs.append((time.perf_counter() - t) / len(paths) * 1000)
    return statistics.median(runs)


def plain_zlib(paths):
    for p in paths:
        with open(p, "rb") as fh:
            zlib.decompress(fh.read(), 31)


def peak_memory_mib(n_maps: int, folder: Path, n_regions: int) -> float:
    code = f"""
import resource, warnings
import roikit.extraction as ex
from roikit.regions import RegionSet, Atlas
folder = {str(folder)!r}
maps = ex.find_maps("sub-{{subject}}_contrast-{{contrast}}_effect.nii.gz", root=folder)
maps = maps.iloc[:{n_maps}]
v = ex.extract(maps, RegionSet([Atlas(folder + "/atlas-{n_regions}.nii.gz", folder + "/atlas-{n_regions}.tsv")]),
               progress=False)
print(resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024)
"""
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    return float(out.stdout.strip().splitlines()[-1])


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--maps", type=int, default=200)
    parser.add_argument("--regions", type=int, default=400)
    parser.add_argument("--repeats", type=int, default=3)
    parser.add_argument("--loop-maps", type=int, default=5, help="maps for the slow per-region loop")
    args = parser.parse_args(argv)

    from roikit import images
    from roikit.extraction import extract, find_maps
    from roikit.regions import Atlas, RegionSet

    folder = RESULTS / "data"
    t0 = time.perf_counter()
    atlas, labels, paths = make_data(args.maps, args.regions, folder)
    print(f"data ready in {time.perf_counter() - t0:.1f} s: {len(paths)} maps in {folder}", file=sys.stderr)
    maps = find_maps("sub-{subject}_contrast-{contrast}_effect.nii.gz", root=folder).iloc[: args.maps]
    regions = RegionSet([Atlas(atlas, labels)])
    paths = [Path(p) for p in maps["path"]]

    results = {}
    plain_zlib(paths[:10])  # warm the page cache
    results["plain_zlib_ms"] = time_per_map(plain_zlib, paths, args.repeats)

    def roikit_serial(ps):
        extract(maps, regions, progress=False)

    results["roikit_ms"] = time_per_map(roikit_serial, paths, args.repeats)

    saved = images._deflate
    images._deflate = None  # the fallback when the `deflate` package is missing: zlib
    try:
        results["roikit_zlib_only_ms"] = time_per_map(roikit_serial, paths, args.repeats)
    finally:
        images._deflate = saved

    def roikit_two(ps):
        extract(maps, regions, progress=False, n_jobs=2)

    results["roikit_2_workers_ms"] = time_per_map(roikit_two, paths, args.repeats)

    labels_img = nib.load(atlas).get_fdata()
    k_all = np.arange(1, args.regions + 1)

    def mask_loop(ps):
        for p in ps:
            data = nib.load(p).get_fdata()
            for k in k_all:
                x = data[labels_img == k]
                x = x[np.isfinite(x) & (x != 0)]
                x.mean() if len(x) else np.nan

    results["mask_loop_ms"] = time_per_map(mask_loop, paths[: args.loop_maps], 1)

    memory = {}
    for n in sorted({10, max(10, args.maps // 4), max(10, args.maps // 2), args.maps}):
        memory[n] = peak_memory_mib(n, folder, args.regions)
        results[f"peak_mib_{n}_maps"] = memory[n]
    mem10, memn = memory[10], memory[args.maps]

    ratios = {
        "throughput_vs_plain_zlib": results["plain_zlib_ms"] / results["roikit_ms"],
        "throughput_vs_plain_zlib_without_libdeflate": results["plain_zlib_ms"] / results["roikit_zlib_only_ms"],
        "speedup_2_workers": results["roikit_ms"] / results["roikit_2_workers_ms"],
        "speedup_vs_mask_loop": results["mask_loop_ms"] / results["roikit_ms"],
        f"memory_{args.maps}_over_10_maps": memn / mem10,
    }
    info = {"maps": args.maps, "regions": args.regions, "repeats": args.repeats, "grid": list(SHAPE),
            "libdeflate": images._deflate is not None, "python": platform.python_version(), "cpus": os.cpu_count(),
            "machine": platform.machine()}
    print(f"\nroikit extraction benchmark: {args.maps} maps 91x109x91 float32 .nii.gz, {args.regions} regions "
          f"(medians of {args.repeats})")
    print(f"{'measure':45s} {'value':>10s}")
    for k, v in results.items():
        print(f"{k:45s} {v:10.2f}")
    for k, v in ratios.items():
        print(f"{k:45s} {v:10.2f}x" if "memory" not in k else f"{k:45s} {v:10.2f}")
    RESULTS.mkdir(exist_ok=True)
    (RESULTS / "bench_extract.json").write_text(json.dumps({"info": info, "results": results, "ratios": ratios,
                                                            "peak_mib_by_maps": memory}, indent=2))
    return 0


if __name__ == "__main__":
    sys.exit(main())
