"""Benchmark: a synthetic 5,000-participant study on a local Dask cluster (2 workers) against this machine alone.

Usage: python benchmarks/bench_cluster.py [--participants 5000] [--contrasts 2] [--shape 30,36,30] [--regions 100]
                                          [--mixed-participants 1000] [--mixed-regions 4] [--workers 2]

Writes (once; reused by later runs) an invented study under benchmarks/results/cluster/: an atlas of REGIONS block
regions on a small grid (default 30 x 36 x 30 voxels of 4 mm: the full 2 mm MNI grid would take hours to write for
10,000 maps on this machine; the extraction cost per map is measured against the full grid by bench_extract.py),
one effect map per participant and contrast (float32 .nii.gz), participants.tsv with a group and an age. Then times,
each once on this machine and once on a LocalCluster of WORKERS worker processes (one thread each):

- extraction of every map (roikit.extraction.extract; locally n_jobs=1, one process);
- statistics (roikit.stats.run_design): one-sample (each contrast), paired, two-group, glm (age + group) with
  Holm/FDR across regions, one-sample with 1,000 sign-flip permutations (max-statistic family-wise p), and the mixed
  design (value ~ contrast, random participant intercept) on MIXED_REGIONS regions of MIXED_PARTICIPANTS participants,
  one region per chunk (its batched fit holds a participants x observations indicator per region, so it is run on a
  subset; see DEVELOPERS.md, "40,000-participant plan").

Every cluster result is checked equal to the local one (tables compared exactly) before its time is printed. One
figure per line; the load (uptime) first, since timings on a shared machine are noisy.
"""

from __future__ import annotations

import argparse
import json
import os
import time
import warnings
from pathlib import Path

import numpy as np
import pandas as pd

OUT = Path(__file__).resolve().parent / "results" / "cluster"


def make_study(root: Path, *, participants: int, contrasts: int, shape: tuple, regions: int) -> None:
    """The invented study (skipped when root already holds one of this size)."""
    import nibabel as nib

    stamp = root / "made.json"
    spec = {"participants": participants, "contrasts": contrasts, "shape": list(shape), "regions": regions}
    if stamp.exists() and json.loads(stamp.read_text()) == spec:
        return
    (root / "maps").mkdir(parents=True, exist_ok=True)
    affine = np.diag([4.0, 4.0, 4.0, 1.0])
    affine[:3, 3] = -np.array(shape) * 2.0
    # REGIONS blocks tiling the central part of the grid (labels 1..REGIONS), 0 elsewhere
    atlas = np.zeros(shape, dtype=np.int16)
    per_axis = int(np.ceil(regions ** (1 / 3)))
    edges = [np.linspace(2, s - 2, per_axis + 1).astype(int) for s in shape]
    label = 0
    for i in range(per_axis):
        for j in range(per_axis):
            for k in range(per_axis):
                if label == regions:
                    break
                label += 1
                atlas[edges[0][i]:edges[0][i + 1], edges[1][j]:edges[1][j + 1], edges[2][k]:edges[2][k + 1]] = label
    nib.save(nib.Nifti1Image(atlas, affine), root / "atlas.nii.gz")
    pd.DataFrame({"index": np.arange(1, regions + 1), "name": [f"region {r:03d}" for r in range(1, regions + 1)]}
                 ).to_csv(root / "atlas.tsv", sep="\t", index=False)
    rng = np.random.default_rng(20261202)
    groups = np.where(np.arange(participants) % 2 == 0, "younger", "older")
    ages = np.round(np.where(groups == "younger", rng.uniform(20, 35, participants), rng.uniform(60, 80, participants)))
    pd.DataFrame({"participant_id": [f"sub-{i:05d}" for i in range(1, participants + 1)], "group": groups,
                  "age": ages}).to_csv(root / "participants.tsv", sep="\t", index=False)
    effect = rng.normal(0, 0.3, (contrasts,) + tuple(shape)).astype(np.float32)  # region-level truth per contrast
    brain = np.zeros(shape, dtype=bool)
    brain[1:-1, 1:-1, 1:-1] = True
    for i in range(1, participants + 1):
        shift = rng.normal(0, 0.5)
        for c in range(contrasts):
            data = (effect[c] + shift + rng.normal(0, 1.0, shape)).astype(np.float32)
            data[~brain] = 0.0
            nib.save(nib.Nifti1Image(data, affine), root / "maps" / f"sub-{i:05d}_contrast-c{c + 1}_effect.nii.gz")
    stamp.write_text(json.dumps(spec))


def timed(func):
    t0 = time.perf_counter()
    result = func()
    return result, time.perf_counter() - t0


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--participants", type=int, default=5000)
    parser.add_argument("--contrasts", type=int, default=2)
    parser.add_argument("--shape", default="30,36,30")
    parser.add_argument("--regions", type=int, default=100)
    parser.add_argument("--mixed-participants", type=int, default=1000)
    parser.add_argument("--mixed-regions", type=int, default=4)
    parser.add_argument("--workers", type=int, default=2)
    args = parser.parse_args()
    warnings.simplefilter("ignore")
    import distributed

    from roikit.extraction import extract, find_maps
    from roikit.regions import Atlas, RegionSet
    from roikit.stats import run_design

    shape = tuple(int(x) for x in args.shape.split(","))
    root = OUT / f"study-{args.participants}x{args.contrasts}-{'x'.join(map(str, shape))}-{args.regions}"
    (_, t_make) = timed(lambda: make_study(root, participants=args.participants, contrasts=args.contrasts,
                                           shape=shape, regions=args.regions))
    maps = find_maps(str(root / "maps" / "sub-{subject}_contrast-{contrast}_effect.nii.gz"))
    regions = RegionSet([Atlas(root / "atlas.nii.gz", labels=root / "atlas.tsv")])
    participants = pd.read_csv(root / "participants.tsv", sep="\t", dtype={"participant_id": str})
    size = np.mean([os.path.getsize(p) for p in maps["path"][:200]]) / 1024
    print(f"load (uptime): {os.getloadavg()[0]:.2f} {os.getloadavg()[1]:.2f} {os.getloadavg()[2]:.2f}")
    print(f"study: {args.participants} participants x {args.contrasts} contrasts = {len(maps)} maps of "
          f"{'x'.join(map(str, shape))} voxels ({size:.0f} KiB each), {args.regions} regions "
          f"(written in {t_make:.0f} s, or reused)")

    analyses = [("one-sample c1", "one-sample", dict(contrast="c1")),
                ("one-sample c2", "one-sample", dict(contrast="c2")),
                ("paired c1 - c2", "paired", dict(contrast="c1", versus="c2")),
                ("two-group c1", "two-group", dict(contrast="c1", group="group", levels=["younger", "older"])),
                ("glm c1 ~ age + group", "glm", dict(contrast="c1", formula="value ~ age + group")),
                ("one-sample c1, 1000 sign-flips", "one-sample",
                 dict(contrast="c1", permutations=1000, seed=1, correct="fwe,holm"))]
    figures: dict = {}

    values, t = timed(lambda: extract(maps, regions, progress=False))
    figures["extraction local (s)"] = t
    stats_local: dict = {}
    for name, design, options in analyses:
        stats_local[name], figures[f"stats local: {name} (s)"] = timed(
            lambda: run_design(values, design, participants=participants, **options))
    mixed_ids = set(participants["participant_id"][:args.mixed_participants].map(lambda s: f"sub-{s}" if not
                                                                                 s.startswith("sub-") else s))
    keep = [f"region {r:03d}" for r in range(1, args.mixed_regions + 1)]
    mixed_values = values[values["participant_id"].astype(str).isin(mixed_ids) & values["region"].isin(keep)]
    mixed_values = mixed_values.assign(region=mixed_values["region"].astype(str))
    mixed_options = dict(formula="value ~ contrast", random="1", chunk_regions=1)
    mixed_local, figures["stats local: mixed (s)"] = timed(lambda: run_design(mixed_values, "mixed", **mixed_options))

    with distributed.LocalCluster(n_workers=args.workers, threads_per_worker=1, processes=True,
                                  dashboard_address=None) as cluster, distributed.Client(cluster) as client:
        # once per worker, not per study: import roikit's statistics and extraction (scipy, pandas, nibabel)
        _, figures["worker start-up: importing roikit (s)"] = timed(
            lambda: client.run(lambda: bool(__import__("roikit.stats") and __import__("roikit.extraction"))))
        remote, t = timed(lambda: extract(maps, regions, progress=False, client=client))
        figures[f"extraction {args.workers} workers (s)"] = t
        pd.testing.assert_frame_equal(values, remote, check_exact=True)
        for name, design, options in analyses:
            result, figures[f"stats {args.workers} workers: {name} (s)"] = timed(
                lambda: run_design(values, design, participants=participants, client=client, **options))
            pd.testing.assert_frame_equal(stats_local[name], result, check_exact=True)
        result, figures[f"stats {args.workers} workers: mixed (s)"] = timed(
            lambda: run_design(mixed_values, "mixed", client=client, **mixed_options))
        pd.testing.assert_frame_equal(mixed_local, result, check_exact=True)

    n_maps = len(maps)
    print(f"worker start-up (importing roikit on every worker, once): "
          f"{figures['worker start-up: importing roikit (s)']:.1f} s")
    print(f"extraction local: {figures['extraction local (s)']:.1f} s ({1000 * figures['extraction local (s)'] / n_maps:.2f} ms per map)")
    t_remote = figures[f"extraction {args.workers} workers (s)"]
    print(f"extraction {args.workers} workers: {t_remote:.1f} s ({1000 * t_remote / n_maps:.2f} ms per map, "
          f"{figures['extraction local (s)'] / t_remote:.2f}x)")
    total_local = total_remote = 0.0
    for name, _, _ in analyses + [("mixed", None, None)]:
        a, b = figures[f"stats local: {name} (s)"], figures[f"stats {args.workers} workers: {name} (s)"]
        total_local += a
        total_remote += b
        what = (f"mixed, {args.mixed_participants} participants x {args.contrasts} contrasts x {args.mixed_regions} "
                "regions" if name == "mixed" else name)
        print(f"statistics {what}: local {a:.2f} s, {args.workers} workers {b:.2f} s ({a / b:.2f}x)")
    print(f"statistics, all analyses: local {total_local:.1f} s, {args.workers} workers {total_remote:.1f} s "
          f"({total_local / total_remote:.2f}x)")
    print("cluster results identical to local ones: yes (every table compared exactly)")
    (OUT / "bench_cluster.json").write_text(json.dumps({"args": vars(args), "figures": figures}, indent=1))


if __name__ == "__main__":
    main()
