"""The invented demo cohort: deterministic files that follow docs/outputs.md and the truth.

The cohort is generated once per module (about 10 s on 2 cores); the checks read it back with
nibabel, scipy, SimpleITK and scikit-learn, which are independent of the generator.
"""
from __future__ import annotations

import datetime as dt
import gzip
import json
import zlib
from itertools import combinations
from pathlib import Path

import nibabel as nib
import numpy as np
import pytest
from scipy import ndimage
from scipy.integrate import solve_ivp

from pipeline.demo.cohort import AUC_BAND, build_subject, make_demo_inputs
from pipeline.errors import UsageError
from pipeline.io.tsv import read_table

pytestmark = pytest.mark.filterwarnings("ignore::DeprecationWarning")


@pytest.fixture(scope="module")
def cohort(tmp_path_factory):
    folder = tmp_path_factory.mktemp("demo")
    paths = make_demo_inputs(folder)
    return folder, paths, json.loads(paths.truth.read_text())


def _readable(truth):
    for subject, doc in truth["subjects"].items():
        for ses in doc["sessions"]:
            if ses["readable"]:
                yield subject, doc, ses


def _half_diagonal(affine) -> float:
    """Half the longest voxel diagonal (mm): the farthest a voxel corner lies from its centre."""
    signs = np.array([(1, 1, 1), (1, 1, -1), (1, -1, 1), (-1, 1, 1)], dtype=float)
    return 0.5 * float(np.linalg.norm(signs @ np.asarray(affine)[:3, :3].T, axis=1).max())


@pytest.fixture(scope="module")
def measured(cohort):
    """Every readable mask, labelled with scipy (26-connectivity) in world mm."""
    folder, _, truth = cohort
    out = {}
    for subject, doc, ses in _readable(truth):
        img = nib.load(folder / ses["mask"])
        data = np.asanyarray(img.dataobj)
        selected = np.isin(data, (1, 3)) if doc["labels"] == "1,3" else data != 0
        box = tuple(slice(h[0], h[-1] + 1) for h in
                    (np.flatnonzero(selected.any(axis=tuple(a for a in range(3) if a != d)))
                     for d in range(3)))
        labels, n = ndimage.label(selected[box], structure=np.ones((3, 3, 3), bool))
        index = np.arange(1, n + 1)
        voxels = ndimage.sum_labels(selected[box], labels, index)
        centres = np.array(ndimage.center_of_mass(selected[box], labels, index)).reshape(-1, 3)
        centres += [b.start for b in box]
        world = centres @ img.affine[:3, :3].T + img.affine[:3, 3]
        vox_mm3 = abs(np.linalg.det(img.affine[:3, :3]))
        out[subject, ses["session"]] = {
            "affine": img.affine, "grid": ses["grid"],
            "values": set(np.flatnonzero(np.bincount(data.ravel(), minlength=256)).tolist()),
            "components": [{"voxels": int(v), "volume_mm3": v * vox_mm3, "centroid_mm": c}
                           for v, c in zip(voxels, world)]}
    return out


def _truth_blobs(doc, session):
    return [(lid, blob) for lid, les in doc["lesions"].items() for row in les["sessions"]
            if row["session"] == session for blob in row["blobs"]]


def _matched(cohort, measured):
    """(subject, session, lesion, truth blob, measured component), nearest world centroid."""
    _, _, truth = cohort
    for subject, doc, ses in _readable(truth):
        comps = measured[subject, ses["session"]]["components"]
        for lid, blob in _truth_blobs(doc, ses["session"]):
            dist = [np.linalg.norm(c["centroid_mm"] - blob["centroid_mm"]) for c in comps]
            yield subject, ses, lid, blob, comps[int(np.argmin(dist))]


def test_same_seed_gives_identical_bytes(cohort, tmp_path):
    folder, _, _ = cohort
    make_demo_inputs(tmp_path)
    first = sorted(p.relative_to(folder) for p in folder.rglob("*") if p.is_file())
    second = sorted(p.relative_to(tmp_path) for p in tmp_path.rglob("*") if p.is_file())
    assert first == second and len(first) > 100
    for rel in first:
        assert (folder / rel).read_bytes() == (tmp_path / rel).read_bytes(), rel
    assert build_subject(0, seed=8).days != build_subject(0, seed=7).days


def test_gzip_headers_carry_no_time_or_name(cohort):
    # Reference: RFC 1952 (GZIP file format) section 2.3: bytes 4-7 MTIME, FLG bit 3 = FNAME.
    folder, _, _ = cohort
    for path in sorted(folder.rglob("*.nii.gz")):
        head = path.read_bytes()[:10]
        assert head[:2] == b"\x1f\x8b" and head[4:8] == b"\x00" * 4, path.name
        assert not head[3] & 0x08, path.name


def test_manifest_events_outcomes_follow_the_contract(cohort):
    # Reference: docs/outputs.md §3.1 and §3.3 (manifest columns, events table); ISO 8601 dates
    # parsed by datetime.date.fromisoformat.
    folder, paths, truth = cohort
    manifest = read_table(paths.manifest)
    assert list(manifest.columns) == ["subject", "session", "mask", "image", "date", "group",
                                      "labels"]
    assert not manifest.duplicated(["subject", "session"]).any()
    for row in manifest.itertuples():
        assert not Path(row.mask).is_absolute() and (folder / row.mask).is_file()
        assert (folder / row.image).is_file()
        dt.date.fromisoformat(row.date)
    assert set(manifest.group) == {"arm-A", "arm-B"}
    assert set(manifest.labels) == {"", "1,3"}
    for subject, rows in manifest.groupby("subject"):
        dates = sorted(dt.date.fromisoformat(d) for d in rows.date)
        assert 4 <= len(rows) <= 7 and 365 <= (dates[-1] - dates[0]).days <= 730, subject
    events = read_table(paths.events, text_columns=("subject", "date", "event"))
    assert list(events.columns) == ["subject", "date", "event", "lesion"]
    assert {"radiosurgery", "chemotherapy", "resection"} <= set(events.event)
    for row in events.itertuples():
        dt.date.fromisoformat(row.date)
        assert np.isnan(row.lesion) or str(int(row.lesion)) in truth["subjects"][row.subject][
            "lesions"]
    assert events.lesion.isna().any() and events.lesion.notna().any()
    outcomes = read_table(paths.outcomes)
    assert list(outcomes.columns) == ["subject", "lesion", "outcome"]
    assert set(outcomes.outcome) == {"local-control", "progression"}
    n_lesions = sum(len(doc["lesions"]) for doc in truth["subjects"].values())
    assert len(outcomes) == n_lesions


def test_outcomes_separate_by_growth_exponent(cohort):
    # Reference: scikit-learn roc_auc_score (test-only dependency).
    from sklearn.metrics import roc_auc_score

    _, paths, truth = cohort
    outcomes = read_table(paths.outcomes)
    beta = [truth["subjects"][r.subject]["lesions"][str(r.lesion)]["marker_beta"]
            for r in outcomes.itertuples()]
    auc = roc_auc_score(outcomes.outcome == "progression", beta)
    assert AUC_BAND[0] <= auc <= AUC_BAND[1]
    assert auc == pytest.approx(truth["cohort_auc_beta"], abs=1e-12)


def test_masks_and_images_have_clean_geometry_headers(cohort, measured):
    # Reference: NIfTI-1 header fields (nifti1.h) as nibabel exposes them.
    folder, _, truth = cohort
    for subject, doc, ses in _readable(truth):
        mask, image = nib.load(folder / ses["mask"]), nib.load(folder / ses["image"])
        values = measured[subject, ses["session"]]["values"]
        assert mask.get_data_dtype() == np.uint8 and image.get_data_dtype() == np.int16
        assert values <= ({0, 1, 2, 3} if doc["labels"] else {0, 1}), (subject, values)
        for img, rel in ((mask, ses["mask"]), (image, ses["image"])):
            with gzip.open(folder / rel) as raw:     # the stored header, before nibabel's
                hdr = nib.Nifti1Header.from_fileobj(raw)   # image resets its scaling fields
            assert int(hdr["sform_code"]) == 1 and int(hdr["qform_code"]) == 1
            assert hdr.get_xyzt_units()[0] == "mm" and float(hdr["scl_slope"]) == 1.0
            assert bytes(hdr["descrip"]).strip(b"\x00") == b""
            assert bytes(hdr["aux_file"]).strip(b"\x00") == b""
            np.testing.assert_allclose(img.affine, ses["affine"], atol=1e-5)
            np.testing.assert_allclose(hdr.get_qform(), hdr.get_sform(), atol=1e-4)
        assert image.shape == mask.shape == tuple(ses["shape"])
    multilabel = [s for s, doc in truth["subjects"].items() if doc["labels"] == "1,3"]
    assert len(multilabel) >= 2


def test_broken_input_fails_to_read(cohort):
    folder, _, truth = cohort
    errors = truth["expected"]["errors"]
    assert len(errors) == 1
    with pytest.raises((EOFError, OSError, zlib.error)):
        np.asanyarray(nib.load(folder / errors[0]["path"]).dataobj)
    with pytest.raises((EOFError, OSError)):
        gzip.decompress((folder / errors[0]["path"]).read_bytes())


def test_component_volumes_match_analytic_ellipsoids(cohort, measured):
    # Reference: analytic ellipsoid volume 4/3 pi a b c (the shear deformation has Jacobian 1).
    # Band (derived): a voxel is counted when its centre lies in the body K, and each voxel
    # lies within r = half its longest diagonal of its centre, so K(-r) <= counted <= K(+r)
    # (inner and outer parallel bodies). For a convex body inside a ball of radius R, the
    # Steiner formula with surface and mean-curvature integrals bounded by the ball's gives
    # |N v - V| <= 4/3 pi ((R + r)^3 - R^3). R = a_max (1 + e1 + e2) holds the sheared body.
    _, _, truth = cohort
    errors = []
    for subject, doc, ses in _readable(truth):
        comps = measured[subject, ses["session"]]["components"]
        assert len(comps) == len(_truth_blobs(doc, ses["session"])), (subject, ses["session"])
    for subject, ses, lid, blob, comp in _matched(cohort, measured):
        a, b, c = blob["semi_axes_mm"]
        volume = 4.0 / 3.0 * np.pi * a * b * c
        assert volume == pytest.approx(blob["volume_mm3"], rel=1e-12)
        big_r = max(blob["semi_axes_mm"]) * (1 + abs(blob["shear"][0]) + abs(blob["shear"][1]))
        r = _half_diagonal(ses["affine"])
        band = 4.0 / 3.0 * np.pi * ((big_r + r) ** 3 - big_r ** 3)
        assert abs(comp["volume_mm3"] - volume) <= band, (subject, ses["session"], lid)
        errors.append((comp["volume_mm3"] - volume) / volume)
    # Reference: point counting on a grid at a random offset is an unbiased volume estimator
    # (Cavalieri principle; Baddeley & Vedel Jensen, Stereology for Statisticians, 2005):
    # over the cohort the relative errors average out.
    errors = np.array(errors)
    assert len(errors) > 100
    assert abs(errors.mean()) < 0.01 and np.sqrt(np.mean(errors ** 2)) < 0.05


def _law_volume(phase, day):
    # Reference: numerical integration of dV/dt = alpha V^beta with scipy.integrate.solve_ivp.
    if day == phase["day_start"]:
        return phase["v0_mm3"]
    sol = solve_ivp(lambda t, v: phase["alpha"] * v ** phase["beta"],
                    (phase["day_start"], day), [phase["v0_mm3"]], rtol=1e-10, atol=1e-12)
    return float(sol.y[0, -1])


def test_truth_volumes_follow_the_growth_laws(cohort):
    _, _, truth = cohort
    for subject, doc in truth["subjects"].items():
        for lid, les in doc["lesions"].items():
            phases = les["phases"]
            for row in les["sessions"]:
                phase = next(p for p in phases if row["day"] <= p["day_end"])
                assert row["law_volume_mm3"] == pytest.approx(_law_volume(phase, row["day"]),
                                                              rel=1e-6), (subject, lid)
                drawn = sum(4 / 3 * np.pi * np.prod(b["semi_axes_mm"]) for b in row["blobs"])
                expected = row["law_volume_mm3"] + sum(
                    _partner_volume(doc, o, row["day"]) for o in row["merged_from"])
                if row["status"] in ("present", "new"):
                    assert drawn == pytest.approx(expected, rel=1e-9), (subject, lid, row)
                    assert 20 <= drawn <= 20000
                if row["status"] == "absent":
                    assert drawn == 0 and row["law_volume_mm3"] < truth["detection_limit_mm3"]
            for before, after in zip(phases, phases[1:]):
                if after["phase"] != "after-resection":
                    assert after["v0_mm3"] == pytest.approx(before["v_end_mm3"], rel=1e-9)
            for p in phases:
                _check_phase_exponent(p)


def _partner_volume(doc, lesion, day):
    phases = doc["lesions"][str(lesion)]["phases"]
    return _law_volume(next(p for p in phases if day <= p["day_end"]), day)


def _check_phase_exponent(p):
    if p["kind"] == "growth" and p["phase"] == "untreated":
        assert 1.2 <= p["beta"] <= 1.8
    elif p["kind"] in ("regrowth",):
        assert p["beta"] < 1 and p["alpha"] > 0
    elif p["kind"] == "decline":
        assert p["alpha"] < 0
    elif p["kind"] == "enlargement":
        # Reference: finite-time blow-up of dV/dt = a V^b (b > 1) at t* = V0^(1-b)/(a (b-1)).
        assert 2.0 <= p["beta"] <= 3.0
        t_star = p["day_start"] + p["v0_mm3"] ** (1 - p["beta"]) / (p["alpha"] * (p["beta"] - 1))
        assert t_star == pytest.approx(p["blowup_day"]) and t_star > p["day_end"] + 30


def test_lesion_positions_agree_across_grids(cohort, measured):
    # Reference: world coordinates through each file's own affine (nibabel, RAS+ mm).
    centroids: dict[tuple, list] = {}
    for subject, ses, lid, blob, comp in _matched(cohort, measured):
        assert np.linalg.norm(comp["centroid_mm"] - blob["centroid_mm"]) <= _half_diagonal(
            ses["affine"])
        centroids.setdefault((subject, lid, tuple(np.round(blob["centroid_mm"], 6))), []).append(
            (ses["grid"], comp["centroid_mm"], _half_diagonal(ses["affine"])))
    pairs = 0
    for key, seen in centroids.items():
        for (g1, c1, r1), (g2, c2, r2) in combinations(seen, 2):
            if g1 != g2:
                pairs += 1
                assert np.linalg.norm(c1 - c2) <= max(r1, r2), key
    assert pairs > 50


def test_lesion_ids_follow_first_appearance_then_volume(cohort, measured):
    # Reference: docs/outputs.md §4.5 `lesion` rule, applied to volumes measured from the masks.
    _, _, truth = cohort
    first: dict[str, dict[str, tuple]] = {}
    for subject, ses, lid, _blob, comp in _matched(cohort, measured):
        doc = truth["subjects"][subject]
        order = [s["session"] for s in doc["sessions"]].index(ses["session"])
        seen = first.setdefault(subject, {})
        if lid not in seen or seen[lid][0] == order:
            previous = seen.get(lid, (order, 0.0))[1]
            seen[lid] = (order, previous - comp["volume_mm3"])
    for subject, seen in first.items():
        ranked = sorted(seen, key=lambda lid: seen[lid])
        assert ranked == [str(i) for i in range(1, len(ranked) + 1)], subject


def test_scenario_holds_every_promised_event(cohort, measured):
    _, _, truth = cohort
    expected = truth["expected"]
    assert all(expected[k] for k in ("splits", "merges", "new", "vanish", "errors"))
    for split in expected["splits"]:
        rows = truth["subjects"][split["subject"]]["lesions"][str(split["lesion"])]["sessions"]
        counts = {r["session"]: r["components"] for r in rows}
        assert counts[split["session"]] == 2
    for item in expected["vanish"]:
        sessions = [s["session"] for s in truth["subjects"][item["subject"]]["sessions"]]
        gap = sessions.index(item["returns_session"]) - sessions.index(item["absent_sessions"][0])
        assert 1 <= gap <= 2
    phases = {p["kind"] for doc in truth["subjects"].values() for les in doc["lesions"].values()
              for p in les["phases"]}
    assert {"growth", "decline", "regrowth", "enlargement"} <= phases
    affines = [np.asarray(m["affine"]) for m in measured.values()]
    assert any(np.abs(a[:3, :3] - np.diag(np.diag(a[:3, :3]))).max() > 0.05 for a in affines)
    assert any(a[0, 0] < 0 for a in affines)                      # stored with x flipped
    assert {"iso", "thick"} <= {m["grid"] for m in measured.values()}


def test_simpleitk_reads_the_same_geometry(cohort):
    # Reference: SimpleITK ReadImage; its LPS geometry converted to RAS+ with
    # A_ras = diag(-1, -1, 1) A_lps, and its (z, y, x) array transposed to (x, y, z).
    import SimpleITK as sitk

    folder, _, truth = cohort
    picked = {}
    for _subject, _doc, ses in _readable(truth):
        picked.setdefault(ses["grid"], ses)
    assert len(picked) >= 6
    for grid, ses in picked.items():
        for rel in (ses["mask"], ses["image"]):
            itk = sitk.ReadImage(str(folder / rel))
            lps = np.eye(4)
            lps[:3, :3] = np.reshape(itk.GetDirection(), (3, 3)) * np.asarray(itk.GetSpacing())
            lps[:3, 3] = itk.GetOrigin()
            ras = np.diag([-1.0, -1.0, 1.0, 1.0]) @ lps
            img = nib.load(folder / rel)
            np.testing.assert_allclose(ras, img.affine, atol=1e-4, err_msg=f"{grid} {rel}")
            np.testing.assert_array_equal(sitk.GetArrayFromImage(itk).transpose(2, 1, 0),
                                          np.asanyarray(img.dataobj))


@pytest.mark.parametrize("seed", [1, 2, 3])
def test_other_seeds_give_valid_plans(seed):
    plans = [build_subject(i, seed=seed) for i in range(12)]
    assert [p.subject for p in plans] == [f"C{i:02d}" for i in range(1, 13)]
    assert all(4 <= len(p.days) <= 7 for p in plans)


def test_subject_count_is_checked(tmp_path):
    with pytest.raises(UsageError, match="n_subjects must be an integer from 1 to 99; got 0"):
        make_demo_inputs(tmp_path, n_subjects=0)
