"""The whole `lesion-growth volumes` command over many generated masks, with 1 and 2 workers.

Run: python benchmarks/command.py [--masks 1000] [--shape 256 256 160]

What an imaging core sees: each run is a fresh `lesion-growth volumes MANIFEST -o OUT` process
(Python start, reading the manifest, stage 1, writing lesions.tsv, masks.tsv, the per-scan cache
and provenance.json), timed from start to exit. The masks are distinct (invented blobs, one seed
each), so the per-scan cache never hides work; every run writes into a new OUT. Both runs must
give the same lesions.tsv. Figures, not a test: nothing asserts speed.
"""
from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
import time
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path

sys.path.insert(0, str(Path(__file__).resolve().parent))

from volumes import make_mask, save  # noqa: E402


def _write(job: tuple[str, tuple[int, int, int], int]) -> None:
    path, shape, seed = job
    save(Path(path), make_mask(shape, seed=seed))


def generate(folder: Path, count: int, shape: tuple[int, int, int]) -> Path:
    """``count`` distinct masks (4 sessions per invented subject) and their manifest."""
    jobs, lines = [], ["subject\tsession\tmask\tday"]
    for i in range(count):
        subject, session = f"S{i // 4:04d}", str(i % 4 + 1)
        name = f"sub-{subject}_ses-{session}_mask.nii.gz"
        jobs.append((str(folder / name), shape, 1000 + i))
        lines.append(f"{subject}\t{session}\t{name}\t{(i % 4) * 60}")
    with ProcessPoolExecutor(os.cpu_count() or 1) as pool:
        list(pool.map(_write, jobs, chunksize=16))
    manifest = folder / "manifest.tsv"
    manifest.write_text("\n".join(lines) + "\n")
    return manifest


def run(manifest: Path, out: Path, workers: int) -> float:
    command = [sys.executable, "-m", "pipeline", "volumes", str(manifest), "-o", str(out),
               "--workers", str(workers), "--quiet"]
    t0 = time.perf_counter()
    done = subprocess.run(command, stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
    elapsed = time.perf_counter() - t0
    if done.returncode:
        raise SystemExit(f"lesion-growth volumes failed ({done.returncode}): {done.stderr}")
    return elapsed


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--masks", type=int, default=1000)
    parser.add_argument("--shape", type=int, nargs=3, default=(256, 256, 160))
    args = parser.parse_args()
    with tempfile.TemporaryDirectory() as tmp:
        folder = Path(tmp)
        t0 = time.perf_counter()
        manifest = generate(folder, args.masks, tuple(args.shape))
        print(f"generated {args.masks} distinct {'x'.join(map(str, args.shape))} uint8 masks in "
              f"{time.perf_counter() - t0:.1f} s")
        times = {}
        for workers in (1, 2):
            times[workers] = run(manifest, folder / f"out{workers}", workers)
            print(f"  lesion-growth volumes --workers {workers}: {times[workers]:.2f} s "
                  f"({args.masks / times[workers]:.1f} masks/s, whole command)")
        same = (folder / "out1" / "lesions.tsv").read_bytes() == \
            (folder / "out2" / "lesions.tsv").read_bytes()
        print(f"  identical lesions.tsv: {same}")
        if not same:
            raise SystemExit("1 and 2 workers disagree")
    print(f"command: {args.masks} masks end to end {times[1]:.1f} s with 1 worker, "
          f"{times[2]:.1f} s with 2 ({times[1] / times[2]:.2f}x)")


if __name__ == "__main__":
    main()
