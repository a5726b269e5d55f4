"""Stage-1 speed and memory next to the read floor and two other ways of doing the same job.

Run: python benchmarks/volumes.py [--repeats 15] [--scaling-masks 1000]

Generates its own masks (invented blobs), then for each size times, in one process and in
interleaved rounds (after one untimed call of each):
  floor     nibabel.load + np.asanyarray(img.dataobj)                 (what reading costs)
  tool      lesion-growth's stage 1 for one mask (read + every lesion figure)
  scipy     get_fdata + scipy.ndimage.label (26-conn) + one pass per label (naive script)
  sitk      SimpleITK ReadImage + ConnectedComponent + LabelShapeStatistics
checks that all agree on component count and voxel counts, and prints medians, min-max, ratios
to the floor and peak memory per voxel of the tool (tracemalloc). Then masks per second with 1 and
2 worker processes over 1000 masks (end to end, and the 2-worker time for all of them). The last
line states the ratios. Figures, not a test: nothing asserts speed.
"""
from __future__ import annotations

import argparse
import os
import statistics
import sys
import tempfile
import time
import tracemalloc
from pathlib import Path

import nibabel as nib
import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from pipeline.run.executors import run_tasks, volumes_task  # noqa: E402
from pipeline.settings import VolumeSettings  # noqa: E402


def make_mask(shape, seed, count=12):
    rng = np.random.default_rng(seed)
    data = np.zeros(shape, np.uint8)
    for _ in range(count):
        radius = rng.uniform(2, 12)
        centre = rng.uniform(radius + 1, np.asarray(shape) - radius - 1)
        lo = np.maximum(np.floor(centre - radius).astype(int), 0)
        hi = np.minimum(np.ceil(centre + radius).astype(int) + 1, shape)
        grid = np.ogrid[lo[0]:hi[0], lo[1]:hi[1], lo[2]:hi[2]]
        ball = sum((g - c) ** 2 for g, c in zip(grid, centre)) <= radius ** 2
        data[lo[0]:hi[0], lo[1]:hi[1], lo[2]:hi[2]][ball] = 1
    return data


def save(path, data):
    image = nib.Nifti1Image(data, np.diag([0.9, 0.9, 1.0, 1.0]))
    image.set_qform(image.affine, 1)
    image.header.set_xyzt_units("mm")
    nib.save(image, str(path))


def floor(path):
    image = nib.load(str(path))
    return np.asanyarray(image.dataobj)


def tool(path):
    result = volumes_task("b", "1", str(path), None, VolumeSettings())
    assert result.ok, result.error
    return sorted(result.table.voxels.tolist())


def naive_scipy(path):
    from scipy import ndimage

    data = nib.load(str(path)).get_fdata()
    labels, count = ndimage.label(data > 0, np.ones((3, 3, 3)))
    return sorted(int((labels == c).sum()) for c in range(1, count + 1))


def simpleitk(path):
    import SimpleITK as sitk

    image = sitk.ReadImage(str(path))
    labels = sitk.ConnectedComponent(image != 0, True)
    stats = sitk.LabelShapeStatisticsImageFilter()
    stats.Execute(labels)
    return sorted(stats.GetNumberOfPixels(c) for c in stats.GetLabels())


def timed(methods, path, repeats):
    """Times of each method, ``repeats`` rounds interleaved (floor, tool, ... then again), so a
    change in the machine's state affects every method alike; one untimed warm-up call each."""
    times = {name: [] for name in methods}
    results = {name: func(path) for name, (func, _) in methods.items()}
    for round_ in range(repeats):
        for name, (func, rounds) in methods.items():
            if round_ < rounds:
                t0 = time.perf_counter()
                results[name] = func(path)
                times[name].append(time.perf_counter() - t0)
    return times, results


def peak_bytes(func, path):
    tracemalloc.start()
    func(path)
    _, peak = tracemalloc.get_traced_memory()
    tracemalloc.stop()
    return peak


def one_size(shape, folder, repeats):
    path = folder / f"mask_{'x'.join(map(str, shape))}.nii.gz"
    save(path, make_mask(shape, seed=sum(shape)))
    rows, results = timed({"floor": (floor, repeats), "tool": (tool, repeats),
                           "scipy": (naive_scipy, 1), "sitk": (simpleitk, repeats)}, path, repeats)
    agree = results["tool"] == results["scipy"] == results["sitk"]
    base = statistics.median(rows["floor"])
    voxels = int(np.prod(shape))
    print(f"\n{shape[0]}x{shape[1]}x{shape[2]} uint8, {len(results['tool'])} lesions, "
          f"all methods agree: {agree}")
    for name, times in rows.items():
        med = statistics.median(times)
        print(f"  {name:6s} median {med:8.4f} s  min-max {min(times):.4f}-{max(times):.4f} s  "
              f"ratio to floor {med / base:6.2f}x")
    per_voxel = peak_bytes(tool, path) / voxels
    print(f"  tool peak traced memory {per_voxel:.2f} bytes/voxel")
    if not agree:
        raise SystemExit("methods disagree: the benchmark's figures are not comparable")
    return statistics.median(rows["tool"]) / base, per_voxel, path


def scaling(path, count, distinct=4, rounds=2):
    """Masks per second with 1 worker (in process) and 2 worker processes over ``count`` tasks
    cycling through ``distinct`` different masks of the same size.

    End to end runs from handing the tasks over to the last answer. The first 2-worker round
    includes starting the pool's fork server (its imports, about 0.4 s): "cold". Later rounds
    find the server running, as a second stage-1 run in the same process would: "end to end".
    "warm" leaves out the first two answers. The set-ups alternate for ``rounds`` rounds and
    the best round of each counts (other load only slows a run down). Next to them, the
    machine's own ceiling: a pure-Python loop in 1 vs 2 processes. Both set-ups must give the
    same tables. Returns (cold ratio, end-to-end ratio, warm ratio, ceiling, seconds for the
    cold 2-worker run).
    """
    shape = nib.load(str(path)).shape
    paths = [Path(path)]
    for k in range(1, distinct):
        paths.append(Path(path).with_name(f"scaling_{k}.nii.gz"))
        save(paths[-1], make_mask(shape, seed=100 + k))
    tasks = [(volumes_task, ("b", str(i), str(paths[i % len(paths)]), None, VolumeSettings()))
             for i in range(count)]
    print(f"  load average before: {_load()}")
    runs, results, cold = {1: [], 2: []}, {}, None
    for _ in range(rounds):
        for workers in (1, 2):
            t0, stamps, results[workers] = time.perf_counter(), [], {}
            for index, result in run_tasks(tasks, workers=workers):
                assert result.ok, result.error
                stamps.append(time.perf_counter() - t0)
                results[workers][index] = result    # compared after the clock stops
            runs[workers].append((count / stamps[-1], (count - 2) / (stamps[-1] - stamps[1])))
            if workers == 2 and cold is None:
                cold = stamps[-1]
    best = {w: (max(r[0] for r in runs[w]), max(r[1] for r in runs[w])) for w in runs}
    print(f"  1 worker:  {best[1][0]:6.2f} masks/s end to end ({count / best[1][0]:.2f} s for "
          f"{count} masks), {best[1][1]:6.2f} masks/s warm (best of {rounds})")
    print(f"  2 workers: {count / cold:6.2f} masks/s cold ({cold:.2f} s for {count} masks, "
          f"starting the pool server included), {best[2][0]:6.2f} masks/s end to end, "
          f"{best[2][1]:6.2f} masks/s warm (best of {rounds})")
    ceiling = _ceiling()
    print(f"  machine ceiling now: 2 processes of a pure-Python loop do {ceiling:.2f}x the work "
          f"of 1; load average after: {_load()}")
    same = all(results[1][i].table.equals(results[2][i].table) for i in range(count))
    print(f"  1 and 2 workers give identical tables: {same}")
    if not same:
        raise SystemExit("1 and 2 workers disagree: the scaling figures are not comparable")
    return (count / cold / best[1][0], best[2][0] / best[1][0], best[2][1] / best[1][1],
            ceiling, cold)


def _load():
    try:
        return " ".join(Path("/proc/loadavg").read_text().split()[:3])
    except OSError:
        return "n/a"


def _spin(n):
    total = 0
    for i in range(n):
        total += i * i
    return total


def _ceiling(n=3_000_000, repeats=3):
    """Work done per second by 2 processes over 1 process, median of ``repeats``."""
    import multiprocessing
    from concurrent.futures import ProcessPoolExecutor

    ratios = []
    context = multiprocessing.get_context("forkserver")
    with ProcessPoolExecutor(2, mp_context=context) as pool:
        list(pool.map(_spin, [10, 10]))
        for _ in range(repeats):
            t0 = time.perf_counter()
            list(pool.map(_spin, [n, n]))
            two = time.perf_counter() - t0
            t0 = time.perf_counter()
            _spin(n), _spin(n)
            ratios.append((time.perf_counter() - t0) / two)
    return statistics.median(ratios)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--repeats", type=int, default=15)
    parser.add_argument("--scaling-masks", type=int, default=1000)
    parser.add_argument("--small-only", action="store_true", help="skip 512x512x300")
    args = parser.parse_args()
    print(f"cores: {os.cpu_count()}; numpy {np.__version__}; nibabel {nib.__version__}")
    shapes = [(256, 256, 160)] + ([] if args.small_only else [(512, 512, 300)])
    with tempfile.TemporaryDirectory() as tmp:
        figures = [one_size(shape, Path(tmp), args.repeats) for shape in shapes]
        int16 = []
        for shape in shapes:
            path = Path(tmp) / f"int16_{'x'.join(map(str, shape))}.nii.gz"
            save(path, make_mask(shape, seed=sum(shape)).astype(np.int16))
            int16.append(peak_bytes(tool, path) / float(np.prod(shape)))
            print(f"int16 mask {shape}: tool peak traced memory {int16[-1]:.2f} bytes/voxel")
        print(f"\nscaling over {args.scaling_masks} masks of {shapes[0]}:")
        speedup = scaling(figures[0][2], args.scaling_masks)
    parts = [f"{'x'.join(map(str, s))}: {r:.2f}x floor, {m:.2f} B/voxel uint8, "
             f"{i16:.2f} B/voxel int16" for s, (r, m, _), i16 in zip(shapes, figures, int16)]
    print(f"volumes: {'; '.join(parts)}; 2 workers vs 1 over {args.scaling_masks} masks: "
          f"{speedup[0]:.2f}x cold ({speedup[4]:.1f} s end to end), {speedup[1]:.2f}x end to end, "
          f"{speedup[2]:.2f}x warm (machine ceiling {speedup[3]:.2f}x, load {_load()}) "
          "(targets: <= 1.25x floor, <= 3 B/voxel uint8, <= 4.5 int16, >= 1.8x)")


if __name__ == "__main__":
    main()
