"""Stage 2 (`lesion-growth match`) against stage 1 (`lesion-growth volumes`) on the same scans.

Run: python benchmarks/match.py [--components 1000 10000 50000] [--subjects 750] [--workers 2]
                                [--shape 128 128 96] [--keep DIR]

Two kinds of invented cohort, each timed as whole commands in fresh processes, in one run:

- specks: one subject, three sessions of a ``--shape`` mask holding one sphere and one-voxel
  specks (on every other voxel, so no two touch), N components in all (N from ``--components``);
  later sessions keep a random 90% of the first session's specks in place, so most match;
- scans: ``--subjects`` subjects with four sessions each (3000 scans by default) of a small
  mask holding three well-separated growing spheres.

For each cohort ``volumes MANIFEST -o OUT --workers W`` is timed, then ``match OUT --workers W``
(which rebuilds stage 1 from the per-scan cache, then links, reviews and writes tracks/), then
stage 1 and stage 2 alone in this process (no start-up, no rebuild). The ratios match / volumes
and stage 2 / stage 1 are the figures (goal: at most 1). ``--keep DIR`` keeps the cohorts and
outputs (``DIR/<cohort>/``) so that another version of the tool can be run on them and compared
with ``benchmarks/compare_outputs.py``. Figures, not a test: nothing asserts speed.
"""
from __future__ import annotations

import argparse
import shutil
import subprocess
import sys
import tempfile
import time
from pathlib import Path

import nibabel as nib
import numpy as np

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))


def _save(path: Path, data: np.ndarray) -> None:
    image = nib.Nifti1Image(data, np.eye(4))
    image.set_qform(image.affine, 1)
    image.header.set_xyzt_units("mm")
    nib.save(image, str(path))


def _ball(data: np.ndarray, centre, radius: float) -> None:
    shape = np.asarray(data.shape)
    lo = np.maximum(np.floor(np.asarray(centre) - radius).astype(int), 0)
    hi = np.minimum(np.ceil(np.asarray(centre) + radius).astype(int) + 1, shape)
    grid = np.ogrid[lo[0]:hi[0], lo[1]:hi[1], lo[2]:hi[2]]
    inside = sum((g - c) ** 2 for g, c in zip(grid, centre)) <= radius ** 2
    data[lo[0]:hi[0], lo[1]:hi[1], lo[2]:hi[2]][inside] = 1


def speck_cohort(folder: Path, components: int, shape: tuple[int, int, int],
                 seed: int = 0) -> Path:
    """Three sessions, one sphere and about ``components / 3 - 1`` specks each."""
    rng = np.random.default_rng(seed)
    folder.mkdir(parents=True, exist_ok=True)
    centre, radius = np.asarray(shape) / 2, min(shape) / 8
    lattice = np.stack(np.meshgrid(*[np.arange(1, s - 1, 2) for s in shape], indexing="ij"),
                       axis=-1).reshape(-1, 3)
    far = np.linalg.norm(lattice - centre, axis=1) > radius + 3
    lattice = lattice[far]
    per_session = max(1, components // 3 - 1)
    if per_session > len(lattice):
        raise SystemExit(f"{components} components do not fit a {shape} mask")
    chosen = lattice[rng.choice(len(lattice), per_session, replace=False)]
    lines = ["subject\tsession\tmask\tday"]
    for session in range(3):
        data = np.zeros(shape, np.uint8)
        _ball(data, centre, radius * (1 + 0.1 * session))
        kept = chosen[rng.random(len(chosen)) < 0.9] if session else chosen
        data[kept[:, 0], kept[:, 1], kept[:, 2]] = 1
        _add(folder, lines, "S", session + 1, session * 60, data)
    return _manifest(folder, lines)


def scan_cohort(folder: Path, subjects: int, seed: int = 1) -> Path:
    """``subjects`` subjects x 4 sessions of a 48^3 mask with three separated growing spheres."""
    rng = np.random.default_rng(seed)
    folder.mkdir(parents=True, exist_ok=True)
    lines = ["subject\tsession\tmask\tday"]
    centres = np.array([[12, 12, 24], [36, 12, 24], [24, 36, 24]], float)
    for s in range(subjects):
        base = rng.uniform(2.0, 4.0, 3)
        jitter = rng.uniform(-2, 2, (3, 3))
        for session in range(4):
            data = np.zeros((48, 48, 48), np.uint8)
            for centre, r in zip(centres + jitter, base * (1 + 0.15 * session)):
                _ball(data, centre, min(r, 8.0))
            _add(folder, lines, f"P{s:04d}", session + 1, session * 90, data)
    return _manifest(folder, lines)


def _add(folder: Path, lines: list[str], subject: str, session: int, day: int,
         data: np.ndarray) -> None:
    name = f"sub-{subject}_ses-{session}_mask.nii.gz"
    _save(folder / name, data)
    lines.append(f"{subject}\t{session}\t{name}\t{day}")


def _manifest(folder: Path, lines: list[str]) -> Path:
    manifest = folder / "manifest.tsv"
    manifest.write_text("\n".join(lines) + "\n")
    return manifest


def measure(name: str, manifest: Path, workers: int) -> tuple[float, float]:
    out = manifest.parent / "out"
    if out.exists():
        shutil.rmtree(out)
    stage1 = _in(manifest.parent, ["volumes", manifest.name, "-o", "out", "--workers",
                                   str(workers), "--quiet"])
    stage2 = _in(manifest.parent, ["match", "out", "--workers", str(workers)])
    rows = sum(1 for _ in open(out / "lesions.tsv")) - 1
    links = sum(1 for _ in open(out / "matches.tsv")) - 1
    print(f"  {name}: {rows} components, {links} links; commands: volumes {stage1:.2f} s, "
          f"match {stage2:.2f} s, match/volumes {stage2 / stage1:.2f}", flush=True)
    alone1, alone2 = _stages_alone(manifest, workers)
    print(f"  {name}: stages alone in one process: stage 1 {alone1:.2f} s, stage 2 "
          f"{alone2:.2f} s, stage 2/stage 1 {alone2 / alone1:.2f}", flush=True)
    return stage1, stage2


def _stages_alone(manifest: Path, workers: int) -> tuple[float, float]:
    """Stage 1 (``run_volumes``, no cache: a new OUT) and stage 2 (``run_matching``) timed in
    this process, without interpreter start-up or the rebuild of stage 1 that ``match`` does."""
    from pipeline.config import load_config
    from pipeline.run.stages import run_matching
    from pipeline.run.stage1 import run_volumes

    out = manifest.parent / "out-alone"
    if out.exists():
        shutil.rmtree(out)
    config = load_config()
    t0 = time.perf_counter()
    stage = run_volumes(manifest, out, config=config, workers=workers)
    t1 = time.perf_counter()
    run_matching(stage, out, config=config, corrections=None, workers=workers)
    return t1 - t0, time.perf_counter() - t1


def _in(folder: Path, args: list[str]) -> float:
    """Time one command run from ``folder`` (the manifest's relative paths resolve there)."""
    t0 = time.perf_counter()
    done = subprocess.run([sys.executable, "-m", "pipeline", *args], cwd=folder,
                          stdout=subprocess.DEVNULL, stderr=subprocess.PIPE, text=True)
    elapsed = time.perf_counter() - t0
    if done.returncode:
        raise SystemExit(f"lesion-growth {' '.join(args)} failed ({done.returncode}): "
                         f"{done.stderr[-2000:]}")
    return elapsed


def main(argv: list[str] | None = None) -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--components", type=int, nargs="*", default=[1000, 10000, 50000],
                        help="total components of each speck cohort (three sessions)")
    parser.add_argument("--subjects", type=int, default=750,
                        help="subjects of the many-scans cohort (4 sessions each; 0: skip)")
    parser.add_argument("--shape", type=int, nargs=3, default=(128, 128, 96))
    parser.add_argument("--workers", type=int, default=2)
    parser.add_argument("--keep", type=Path, default=None,
                        help="keep cohorts and outputs in this folder")
    args = parser.parse_args(argv)
    root = args.keep or Path(tempfile.mkdtemp(prefix="match-bench-"))
    try:
        print(f"whole commands, --workers {args.workers}, timed in one run:", flush=True)
        for n in args.components:
            manifest = speck_cohort(root / f"specks{n}", n, tuple(args.shape))
            measure(f"specks {n}", manifest, args.workers)
        if args.subjects:
            manifest = scan_cohort(root / f"scans{args.subjects}", args.subjects)
            measure(f"{args.subjects * 4} scans", manifest, args.workers)
    finally:
        if args.keep is None:
            shutil.rmtree(root, ignore_errors=True)


if __name__ == "__main__":
    main()
