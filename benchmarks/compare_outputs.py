"""Compare the stage-2 outputs of two output folders (e.g. two versions of the tool, same input).

Run: python benchmarks/compare_outputs.py OLD_OUT NEW_OUT [--all]

matches.tsv and longitudinal.tsv (with ``--all``: every table and JSON file in OUT except
provenance.json, the run state and the report page, which differ by design) must be
byte-identical; every track image in tracks/ must exist in both and read (nibabel) with the same
header block, dtype, shape, affine and voxel values (the compressed bytes may differ: the gzip
level is not part of the result). Prints each difference
and exits 1 when there is one, 0 otherwise.
"""
from __future__ import annotations

import argparse
import sys
from pathlib import Path

import nibabel as nib
import numpy as np

TABLES = ("matches.tsv", "longitudinal.tsv")


#: Files of OUT that differ between runs by design: times, run ids, the report's own page.
BY_DESIGN = ("provenance.json", ".run-state.json", "report.html")


def compare(old: Path, new: Path, *, everything: bool = False) -> list[str]:
    """Differences between the outputs of ``old`` and ``new`` (empty: identical): the stage-2
    tables and track images, or with ``everything`` every .tsv and .json file in OUT too."""
    found = []
    names = TABLES
    if everything:
        files = {p.name for folder in (old, new) for p in folder.iterdir()
                 if p.suffix in (".tsv", ".json") and p.name not in BY_DESIGN}
        names = tuple(sorted(files))
    for name in names:
        a, b = old / name, new / name
        if not a.is_file() or not b.is_file():
            found.append(f"{name}: missing in {'old' if not a.is_file() else 'new'}")
        elif a.read_bytes() != b.read_bytes():
            lines_a, lines_b = a.read_text().splitlines(), b.read_text().splitlines()
            first = next((i for i, (x, y) in enumerate(zip(lines_a, lines_b)) if x != y),
                         min(len(lines_a), len(lines_b)))
            found.append(f"{name}: differs ({len(lines_a)} vs {len(lines_b)} lines; first at "
                         f"line {first + 1})")
    names_a = {p.name for p in (old / "tracks").glob("*.nii.gz")}
    names_b = {p.name for p in (new / "tracks").glob("*.nii.gz")}
    for name in sorted(names_a ^ names_b):
        found.append(f"tracks/{name}: only in {'old' if name in names_a else 'new'}")
    for name in sorted(names_a & names_b):
        found.extend(f"tracks/{name}: {what}" for what in
                     _image_differences(old / "tracks" / name, new / "tracks" / name))
    return found


def _image_differences(a: Path, b: Path) -> list[str]:
    img_a, img_b = nib.load(str(a)), nib.load(str(b))
    out = []
    if img_a.header.binaryblock != img_b.header.binaryblock:
        out.append("header differs")
    data_a, data_b = np.asanyarray(img_a.dataobj), np.asanyarray(img_b.dataobj)
    if data_a.dtype != data_b.dtype or data_a.shape != data_b.shape:
        out.append(f"dtype/shape {data_a.dtype}{data_a.shape} vs {data_b.dtype}{data_b.shape}")
    elif not np.array_equal(data_a, data_b):
        out.append(f"{int(np.count_nonzero(data_a != data_b))} voxels differ")
    if not np.array_equal(img_a.affine, img_b.affine):
        out.append("affine differs")
    return out


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("old", type=Path)
    parser.add_argument("new", type=Path)
    parser.add_argument("--all", action="store_true", help="compare every table and JSON file")
    args = parser.parse_args(argv)
    found = compare(args.old, args.new, everything=args.all)
    images = len(list((args.new / "tracks").glob("*.nii.gz")))
    for line in found:
        print(line)
    print(f"{'identical' if not found else f'{len(found)} difference(s)'}: "
          f"{'every table and JSON file' if args.all else ', '.join(TABLES)} and {images} track "
          "images")
    return 1 if found else 0


if __name__ == "__main__":
    sys.exit(main())
