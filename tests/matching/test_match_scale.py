"""Stage 2 at scale: the spatial index finds exactly the brute-force candidates, the assignment
per connected part equals the dense one, a pool gives the serial tables, and fast track-image
writing reads back as nibabel's own writer, and the same-grid Dice shortcut equals the formula.

References: a brute-force scan over every pair (common practice for checking a spatial index);
``scipy.optimize.linear_sum_assignment`` on the full matrix with forbidden cells at a large cost
(the formulation stage 2 used before the index); nibabel's ``Nifti1Image.to_bytes`` and
``nibabel.save`` for the written files; the serial in-process run for the pool.
"""
from __future__ import annotations

import gzip
import shutil

import nibabel as nib
import numpy as np
import pandas as pd
import pytest
from hypothesis import HealthCheck, given, settings
from hypothesis import strategies as st
from scipy.optimize import linear_sum_assignment

from pipeline.matching import candidates
from pipeline.matching.candidates import close_pairs, session_evidence, sparse_assignment
from pipeline.cli import main
from pipeline.io.nifti import save_label_image
from pipeline.matching.overlap import dice_world, pair_evidence, scan_geometry
from pipeline.settings import MatchSettings
from tests.cohort import make_cohort
from tests.match_fixtures import label_scan

SLOW = settings(max_examples=25, deadline=None,
                suppress_health_check=[HealthCheck.too_slow])


def _brute_pairs(a, ra, b, rb):
    """Every pair tried (reference), with the bound close_pairs documents."""
    gap = np.linalg.norm(a[:, None, :] - b[None, :, :], axis=-1)
    bound = (ra[:, None] + rb[None, :]) * (1 + candidates._SLACK) + candidates._SLACK_MM
    return sorted(map(tuple, np.argwhere(gap <= bound).tolist()))


@SLOW
@given(seed=st.integers(0, 2**32 - 1), n_a=st.integers(0, 60), n_b=st.integers(0, 60),
       spread=st.floats(1.0, 200.0), reach=st.floats(0.01, 40.0))
def test_close_pairs_equal_brute_force(seed, n_a, n_b, spread, reach):
    rng = np.random.default_rng(seed)
    a, b = rng.uniform(-spread, spread, (n_a, 3)), rng.uniform(-spread, spread, (n_b, 3))
    if n_a and n_b and rng.random() < 0.3:           # exact duplicates and shared points
        b[: min(n_a, n_b) // 2] = a[: min(n_a, n_b) // 2]
    ra, rb = rng.uniform(0, reach, n_a), rng.uniform(0, reach, n_b)
    found = sorted(map(tuple, close_pairs(a, ra, b, rb).tolist()))
    assert found == _brute_pairs(a, ra, b, rb)


def _random_scan(rng, session, shape, zooms):
    """Random specks and blobs on a small grid (invented), labelled as stage 1 does."""
    mask = np.zeros(shape, bool)
    for _ in range(rng.integers(1, 12)):
        centre = rng.uniform(0, shape)
        radius = rng.choice([0.4, rng.uniform(0.5, 4.0)])
        grid = np.ogrid[tuple(slice(0, s) for s in shape)]
        mask |= sum((g - c) ** 2 for g, c in zip(grid, centre)) <= radius ** 2
    affine = np.diag([*zooms, 1.0])
    affine[:3, 3] = rng.uniform(-3, 3, 3)
    return label_scan(mask, affine, subject="01", session=session, day=0.0)


@SLOW
@given(seed=st.integers(0, 2**32 - 1), ratio=st.floats(0.2, 4.0), max_mm=st.floats(0.5, 40.0),
       min_radius=st.floats(0.1, 6.0), coarse=st.booleans())
def test_indexed_candidates_equal_every_pair_scored(seed, ratio, max_mm, min_radius, coarse):
    rng = np.random.default_rng(seed)
    match = MatchSettings(max_distance_ratio=ratio, max_distance_mm=max_mm,
                          min_radius_mm=min_radius)
    first = _random_scan(rng, "1", (24, 24, 24), (1.0, 1.0, 1.0))
    second = _random_scan(rng, "2", (24, 24, 10) if coarse else (24, 24, 24),
                          (1.0, 1.0, 2.5) if coarse else (1.0, 1.0, 1.0))
    geoms = [scan_geometry(scan, rows) for scan, rows in (first, second)]
    frontier = [(0, c) for c in sorted(geoms[0].voxels)]
    current = [(1, c) for c in sorted(geoms[1].voxels)]
    indexed = session_evidence(geoms, frontier, current, match)
    every = {}
    for f in frontier:                                  # reference: every pair scored
        for k in current:
            evidence = pair_evidence(geoms[0], f[1], geoms[1], k[1], settings=match)
            if evidence.candidate:
                every[(f, k)] = evidence
    assert indexed == every
    assert list(indexed) == [pair for pair in every]     # same order: frontier, then current


@SLOW
@given(seed=st.integers(0, 2**32 - 1), rows=st.integers(1, 40), cols=st.integers(1, 40),
       density=st.floats(0.0, 0.3), dense_cells=st.sampled_from([0, 10**9]))
def test_assignment_by_parts_equals_the_dense_matrix(seed, rows, cols, density, dense_cells):
    rng = np.random.default_rng(seed)
    allowed = rng.random((rows, cols)) < density
    costs = {(int(i), int(j)): float(rng.random()) for i, j in np.argwhere(allowed)}
    matrix = np.full((rows, cols), 1e6)                 # reference: the old dense formulation
    for (i, j), cost in costs.items():
        matrix[i, j] = cost
    r, c = linear_sum_assignment(matrix)
    expected = sorted((int(i), int(j)) for i, j in zip(r, c) if matrix[i, j] < 1e6)
    old, candidates.DENSE_CELLS = candidates.DENSE_CELLS, dense_cells
    try:
        found = sparse_assignment(rows, cols, costs)
    finally:
        candidates.DENSE_CELLS = old
    assert found == expected   # random costs: the optimum is unique (almost surely)


def test_pool_and_serial_stage2_give_identical_outputs(tmp_path):
    make_cohort(tmp_path / "in")
    out = tmp_path / "out"
    assert main(["volumes", str(tmp_path / "in" / "manifest.tsv"), "-o", str(out),
                 "--quiet"]) == 1                      # B's last mask is missing (expected)
    pooled = tmp_path / "pooled"
    assert main(["match", str(out), "--workers", "1"]) == 1
    shutil.copytree(out, pooled)
    for name in ("matches.tsv", "longitudinal.tsv"):
        (pooled / name).unlink()
    shutil.rmtree(pooled / "tracks")
    assert main(["match", str(pooled), "--workers", "2"]) == 1
    for name in ("matches.tsv", "longitudinal.tsv", "errors.tsv"):
        assert (out / name).read_bytes() == (pooled / name).read_bytes(), name
    images = sorted(p.name for p in (out / "tracks").iterdir())
    assert images == sorted(p.name for p in (pooled / "tracks").iterdir()) and images
    for name in images:
        assert (out / "tracks" / name).read_bytes() == (pooled / "tracks" / name).read_bytes()
    assert len(pd.read_csv(out / "matches.tsv", sep="\t")) > 0


@settings(max_examples=20, deadline=None)
@given(seed=st.integers(0, 2**32 - 1), dtype=st.sampled_from([np.uint8, np.int16, np.int32]),
       shape=st.tuples(st.integers(1, 17), st.integers(1, 13), st.integers(1, 9)),
       fortran=st.booleans(), forms=st.booleans())
def test_label_images_read_as_nibabel_writes_them(tmp_path_factory, seed, dtype, shape, fortran,
                                                  forms):
    rng = np.random.default_rng(seed)
    labels = rng.integers(0, np.iinfo(dtype).max, shape).astype(dtype)
    labels[rng.random(shape) < 0.7] = 0
    labels = np.asfortranarray(labels) if fortran else labels
    affine = np.diag([*rng.uniform(0.5, 3.0, 3), 1.0])
    affine[:3, 3] = rng.uniform(-50, 50, 3)
    folder = tmp_path_factory.mktemp("images")
    mine = folder / "mine.nii.gz"
    options = {"forms": np.stack([affine, affine]), "form_codes": (2, 1)} if forms else {}
    save_label_image(mine, labels, affine, **options)
    written = nib.load(str(mine))
    # reference: nibabel's own serialisation of the same image (header and voxels, byte for byte)
    assert gzip.decompress(mine.read_bytes()) == written.to_bytes()
    reference = folder / "nibabel.nii.gz"
    nib.save(written, str(reference))
    again = nib.load(str(reference))
    assert again.header.binaryblock == written.header.binaryblock
    assert np.asanyarray(written.dataobj).dtype == np.dtype(dtype)
    assert np.array_equal(np.asanyarray(written.dataobj), labels)
    assert np.array_equal(np.asanyarray(again.dataobj), labels)


@SLOW
@given(seed=st.integers(0, 2**32 - 1), oblique=st.booleans(), density=st.floats(0.02, 0.3))
def test_same_grid_dice_equals_the_textbook_formula(seed, oblique, density):
    rng = np.random.default_rng(seed)
    affine = np.diag([*rng.uniform(0.5, 3.0, 3), 1.0])
    affine[:3, 3] = rng.uniform(-50, 50, 3)
    if oblique:
        q, _ = np.linalg.qr(rng.normal(size=(3, 3)))
        affine[:3, :3] = q @ affine[:3, :3]
    scans = [label_scan(rng.random((14, 12, 10)) < density, affine, subject="01", session=s,
                        day=0.0) for s in ("1", "2")]
    geoms = [scan_geometry(scan, rows) for scan, rows in scans]
    full = [scan.full_components() for scan, _ in scans]
    for ca in sorted(geoms[0].voxels)[:8]:
        for cb in sorted(geoms[1].voxels)[:8]:
            a, b = full[0] == ca, full[1] == cb
            # Dice 1945: 2 |A n B| / (|A| + |B|), on the full arrays of the shared grid
            expected = 2.0 * np.count_nonzero(a & b) / (a.sum() + b.sum())
            assert dice_world(geoms[0], ca, geoms[1], cb) == pytest.approx(expected, abs=0)
