"""A small but complete invented OUT folder for the report tests.

Everything here is invented: two fictional subjects with a few spherical lesions on tiny grids,
their track images, plausible tables and MRI-like images for one subject. The lesion tables are
measured from the drawn arrays (numpy / scipy.ndimage), so the folder is self-consistent.

Known facts the tests check are returned in :class:`ReportFixture`.
"""
from __future__ import annotations

import json
from dataclasses import dataclass
from pathlib import Path

import nibabel as nib
import numpy as np
import pandas as pd
from scipy import ndimage

from pipeline.io.tsv import write_table

# (lesion id, centre voxel, radius in voxels) per session; a lesion id of 0 is not drawn.
_P01_DAYS = {"01": 0.0, "02": 30.0, "03": 60.0, "04": 120.0}
_P01_LESIONS = {
    "01": [(1, (6, 9, 5), 2.0), (2, (14, 9, 5), 1.5)],
    "02": [(1, (6, 9, 5), 2.5), (2, (14, 9, 5), 1.7), (3, (6, 16, 4), 1.0)],
    "03": [(1, (6, 9, 5), 3.0), (2, (14, 9, 5), 1.8), (3, (8, 16, 4), 1.0)],
    # lesion 2 grows into lesion 1: one component, labelled with the survivor's id
    "04": [(1, (6, 9, 5), 3.2), (1, (12, 9, 5), 2.2)],
}
_P02_DAYS = {"01": 0.0, "02": 50.0, "03": 100.0}
_P02_LESIONS = {
    "01": [(1, (1, 8, 4), 2.0), (2, (10, 8, 4), 1.5)],
    "02": [(1, (1, 8, 4), 2.2), (2, (10, 8, 4), 1.8)],
    "03": [(1, (1, 8, 4), 2.4), (2, (10, 8, 4), 2.1)],
}


@dataclass(frozen=True)
class ReportFixture:
    """Where the folder is and what is known to be in it."""

    out: Path
    inputs: Path
    known_beta: tuple[str, int, str, float, float, float]  # subject lesion phase beta low high
    low_confidence_link: tuple[str, str, int, str, int]    # subject ses_from c_from ses_to c_to
    confident_link: tuple[str, str, int, str, int]
    merged: tuple[str, int, int]                           # subject, merged lesion, survivor
    border_lesion: tuple[str, int]
    non_measurable_lesion: tuple[str, int]
    fit_without_interval: tuple[str, int, str]
    failed_session: tuple[str, str]
    subjects: tuple[str, ...]
    component_lesion: dict[tuple[str, str, int], int]      # (subject, session, component)


def _affine(zooms: tuple[float, float, float], *, flip_x: bool) -> np.ndarray:
    affine = np.diag([*zooms, 1.0])
    if flip_x:  # LAS storage, as many scanners write it
        affine[0, 0] = -zooms[0]
    affine[:3, 3] = [10.0, -20.0, 5.0]
    return affine


def _draw(shape: tuple[int, int, int], spheres: list) -> np.ndarray:
    grid = np.indices(shape).transpose(1, 2, 3, 0)
    track = np.zeros(shape, np.int16)
    for lesion, centre, radius in spheres:
        inside = np.linalg.norm(grid - np.asarray(centre), axis=-1) <= radius
        track[inside & (track == 0)] = lesion
    return track


def _save(array: np.ndarray, affine: np.ndarray, path: Path) -> None:
    path.parent.mkdir(parents=True, exist_ok=True)
    image = nib.Nifti1Image(array, affine)
    image.header.set_data_dtype(array.dtype)
    nib.save(image, str(path))


def _components(track: np.ndarray) -> list[tuple[int, np.ndarray]]:
    """(lesion id, boolean mask) per connected component, largest first (26-connectivity)."""
    labels, n = ndimage.label(track > 0, structure=np.ones((3, 3, 3)))
    found = [labels == c for c in range(1, n + 1)]
    found.sort(key=lambda mask: -int(mask.sum()))
    return [(int(np.bincount(track[m]).argmax()), m) for m in found]


def _lesion_rows(subject, session, day, track, affine, group, mask_path):
    rows = []
    voxel_volume = float(abs(np.linalg.det(affine[:3, :3])))
    for number, (lesion, mask) in enumerate(_components(track), start=1):
        ijk = np.argwhere(mask)
        centroid = affine @ np.append(ijk.mean(axis=0), 1.0)
        volume = float(mask.sum()) * voxel_volume
        equivalent = (6.0 * volume / np.pi) ** (1 / 3)
        lo, hi = ijk.min(axis=0), ijk.max(axis=0)
        slices = int(hi[2] - lo[2] + 1)
        rows.append({
            "subject": subject, "session": session, "day": day, "component": number, "label": 1,
            "voxels": int(mask.sum()), "volume_mm3": volume,
            "centroid_x_mm": centroid[0], "centroid_y_mm": centroid[1],
            "centroid_z_mm": centroid[2], "max_axial_diameter_mm": round(1.1 * equivalent, 2),
            "equivalent_diameter_mm": round(equivalent, 2),
            "bbox_i_min": lo[0], "bbox_i_max": hi[0], "bbox_j_min": lo[1], "bbox_j_max": hi[1],
            "bbox_k_min": lo[2], "bbox_k_max": hi[2], "axial_slices": slices,
            "touches_border": bool((lo == 0).any() or (hi == np.array(track.shape) - 1).any()),
            "measurable": bool(1.1 * equivalent >= 10.0 and slices >= 2),
            "mask": mask_path, "group": group, "_lesion": lesion, "_mask": mask,
        })
    return rows


def _subject(out, inputs, subject, group, days, lesions, shape, zooms, *, images, flip_x,
             dtype=np.int16):
    affine = _affine(zooms, flip_x=flip_x)
    rng = np.random.default_rng(7)
    comp_rows, mask_rows = [], []
    for session, spheres in lesions.items():
        track = _draw(shape, spheres)
        _save(track.astype(dtype), affine,
              out / "tracks" / f"sub-{subject}_ses-{session}_tracks.nii.gz")
        mask_path = f"masks/sub-{subject}_ses-{session}_mask.nii.gz"
        image_path = ""
        if images:
            image_path = f"images/sub-{subject}_ses-{session}_T1w.nii.gz"
            mri = 400 + 60 * rng.standard_normal(shape) + 500 * (track > 0)
            if session != "04":  # the last image is named in masks.tsv but missing on disk
                _save(mri.astype(np.int16), affine, inputs / image_path)
        rows = _lesion_rows(subject, session, days[session], track, affine, group, mask_path)
        comp_rows += rows
        mask_rows.append({
            "subject": subject, "session": session, "day": days[session], "mask": mask_path,
            "image": image_path, "group": group, "components": len(rows),
            "volume_mm3": sum(r["volume_mm3"] for r in rows),
            "voxel_volume_mm3": float(np.prod(zooms)), "shape_x": shape[0], "shape_y": shape[1],
            "shape_z": shape[2], "sha256": f"{len(comp_rows):064x}"})
    return comp_rows, mask_rows


def _dice(a: np.ndarray, b: np.ndarray) -> float:
    return float(2.0 * (a & b).sum() / (a.sum() + b.sum()))


def _matches(components: list[dict], merged_into: dict[tuple[str, int], int]) -> pd.DataFrame:
    rows = []
    by_scan: dict[tuple[str, str], list[dict]] = {}
    for row in components:
        by_scan.setdefault((row["subject"], row["session"]), []).append(row)
    keys = sorted(by_scan)
    for (subj_a, ses_a), (subj_b, ses_b) in zip(keys, keys[1:]):
        if subj_a != subj_b:
            continue
        targets = by_scan[(subj_b, ses_b)]
        for a in by_scan[(subj_a, ses_a)]:
            lesion = merged_into.get((subj_a, a["_lesion"]), a["_lesion"]) \
                if ses_b == "04" else a["_lesion"]
            for b in targets:
                if b["_lesion"] != lesion:
                    continue
                relation = "merges" if sum(
                    merged_into.get((subj_a, x["_lesion"]), x["_lesion"]) == lesion
                    for x in by_scan[(subj_a, ses_a)]) > 1 and ses_b == "04" else "continues"
                distance = float(np.linalg.norm([a[f"centroid_{c}_mm"] - b[f"centroid_{c}_mm"]
                                                 for c in "xyz"]))
                overlap = round(_dice(a["_mask"], b["_mask"]), 3)
                rows.append({"subject": subj_a, "session_from": ses_a,
                             "component_from": a["component"], "session_to": ses_b,
                             "component_to": b["component"], "relation": relation,
                             "overlap": overlap, "centroid_distance_mm": round(distance, 2),
                             # extras as the matching stage writes them
                             "review": overlap < 0.2,
                             "review_reason": "small-overlap" if overlap < 0.2 else "",
                             "lesion_from": a["_lesion"], "lesion_to": b["_lesion"]})
    return pd.DataFrame(rows)


def _longitudinal(components: list[dict]) -> pd.DataFrame:
    table = pd.DataFrame([{k: v for k, v in r.items() if k != "_mask"} for r in components])
    grouped = table.groupby(["subject", "_lesion", "session", "day", "group"], as_index=False)
    sums = grouped.agg(volume_mm3=("volume_mm3", "sum"), components=("component", "size"))
    sums = sums.rename(columns={"_lesion": "lesion"})
    sums["status"] = "present"
    sums["merged_into"] = ""
    sums["merged_from"] = ""
    extra = [
        {"subject": "P01", "lesion": 3, "session": "04", "day": 120.0, "group": "armA",
         "volume_mm3": 0.0, "components": 0, "status": "absent", "merged_into": "",
         "merged_from": ""},
        {"subject": "P01", "lesion": 2, "session": "04", "day": 120.0, "group": "armA",
         "volume_mm3": float("nan"), "components": 0, "status": "merged", "merged_into": "1",
         "merged_from": ""},
    ]
    table = pd.concat([sums, pd.DataFrame(extra)], ignore_index=True)
    table.loc[(table.subject == "P01") & (table.lesion == 3) & (table.session == "02"),
              "status"] = "new"
    table.loc[(table.subject == "P01") & (table.lesion == 1) & (table.session == "04"),
              "merged_from"] = "2"
    return table.sort_values(["subject", "lesion", "day"]).reset_index(drop=True)


def _power_row(series: pd.DataFrame, subject, lesion, phase, beta, low, high, note=""):
    """A plausible power-law row: the curve passes through the first and last volumes."""
    first, last = series.iloc[0], series.iloc[-1]
    span = last.day - first.day
    k = ((last.volume_mm3 / first.volume_mm3) ** (1 - beta) - 1) / ((1 - beta) * span)
    return {"subject": subject, "lesion": lesion, "phase": phase, "model": "power",
            "n_points": len(series), "day_start": first.day, "day_end": last.day,
            "v0_mm3": first.volume_mm3, "k_per_day": k,
            "alpha": k * first.volume_mm3 ** (1 - beta), "beta": beta, "beta_ci_low": low,
            "beta_ci_high": high, "aicc": -12.5, "note": note, "best": True}


def _fits(longitudinal: pd.DataFrame) -> pd.DataFrame:
    def series(subject, lesion, sessions):
        rows = longitudinal[(longitudinal.subject == subject) & (longitudinal.lesion == lesion)]
        return rows[rows.session.isin(sessions)]
    nan = float("nan")
    rows = [
        _power_row(series("P01", 1, ["01", "02", "03"]), "P01", 1, "untreated", 0.74, 0.52, 0.96),
        _power_row(series("P01", 2, ["01", "02", "03"]), "P01", 2, "untreated", 0.61, 0.2, 1.05),
        _power_row(series("P02", 2, ["01", "02", "03"]), "P02", 2, "untreated", 0.88, nan, nan,
                   note="3 sessions for 3 parameters: no interval"),
        _power_row(series("P02", 1, ["01", "02", "03"]), "P02", 1, "untreated", 1.12, 0.7, 1.6),
    ]
    rows.append({"subject": "P01", "lesion": 1, "phase": "after-radiosurgery",
                 "model": "exponential", "n_points": 2, "day_start": 60.0, "day_end": 120.0,
                 "v0_mm3": nan, "k_per_day": nan, "alpha": nan, "beta": nan,
                 "beta_ci_low": nan, "beta_ci_high": nan, "aicc": nan, "best": True,
                 "note": "2 sessions in phase; power law needs 3"})
    return pd.DataFrame(rows)


def build_report_folder(root: Path) -> ReportFixture:
    """Write an invented OUT folder under ``root/out`` (inputs under ``root/inputs``)."""
    out, inputs = root / "out", root / "inputs"
    out.mkdir(parents=True)
    inputs.mkdir(parents=True)
    comp1, masks1 = _subject(out, inputs, "P01", "armA", _P01_DAYS, _P01_LESIONS, (20, 20, 10),
                             (2.0, 2.0, 3.0), images=True, flip_x=True)
    comp2, masks2 = _subject(out, inputs, "P02", "armB", _P02_DAYS, _P02_LESIONS, (16, 16, 8),
                             (1.5, 1.5, 1.5), images=False, flip_x=False,
                             dtype=np.uint8)  # the matching stage writes the smallest dtype
    empty = np.zeros((8, 8, 4), np.int16)
    _save(empty, np.eye(4), out / "tracks" / "sub-P03_ses-01_tracks.nii.gz")
    masks3 = [{**masks2[0], "subject": "P03", "session": "01", "day": 0.0, "components": 0,
               "volume_mm3": 0.0, "group": "", "mask": "masks/sub-P03_ses-01_mask.nii.gz",
               "voxel_volume_mm3": 1.0, "shape_x": 8, "shape_y": 8, "shape_z": 4}]
    components = comp1 + comp2
    lesions = pd.DataFrame([{k: v for k, v in r.items() if not k.startswith("_")}
                            for r in components])
    write_table(lesions, out / "lesions.tsv")
    write_table(pd.DataFrame(masks1 + masks2 + masks3), out / "masks.tsv")
    write_table(_matches(components, {("P01", 2): 1}), out / "matches.tsv")
    write_table(pd.DataFrame([{"subject": r["subject"], "session": r["session"],
                               "component": r["component"], "lesion": r["_lesion"]}
                              for r in components]), out / "lesion_components.tsv")
    longitudinal = _longitudinal(components)
    write_table(longitudinal, out / "longitudinal.tsv")
    write_table(_fits(longitudinal), out / "fits.tsv")
    write_table(pd.DataFrame([
        {"group": "armA", "phase": "untreated", "model": "power", "n_lesions": 2,
         "n_points": 6, "beta": 0.69, "beta_ci_low": 0.48, "beta_ci_high": 0.9},
        {"group": "armB", "phase": "untreated", "model": "power", "n_lesions": 2,
         "n_points": 6, "beta": 1.01, "beta_ci_low": 0.77, "beta_ci_high": 1.25}]),
        out / "group_fits.tsv")
    write_table(pd.DataFrame([{"subject": "P02", "session": "04",
                               "path": "masks/sub-P02_ses-04_mask.nii.gz", "stage": "volumes",
                               "reason": "mask values are not integers (float 0.4)"}]),
                out / "errors.tsv")
    write_table(pd.DataFrame([{"subject": "P01", "day": 60.0, "event": "radiosurgery",
                               "lesion": float("nan")}]), out / "events.tsv")
    write_table(pd.DataFrame([{"figure": "beta", "n": 4, "auc": 0.75, "auc_ci_low": 0.3,
                               "auc_ci_high": 1.0}]), out / "evaluation.tsv")
    provenance = {"tool": {"name": "lesion-growth", "version": "0.1.0"},
                  "input": {"path": str(inputs / "manifest.tsv"), "kind": "manifest"},
                  "files": {"input": {"path": str(inputs / "manifest.tsv"), "sha256": "0" * 64}},
                  "started": "2000-01-01T00:00:00", "finished": "2000-01-01T00:01:00"}
    (out / "provenance.json").write_text(json.dumps(provenance), encoding="utf-8")
    p01 = [r for r in comp1 if r["session"] == "02"]
    p01_next = [r for r in comp1 if r["session"] == "03"]
    c3_from = next(r["component"] for r in p01 if r["_lesion"] == 3)
    c3_to = next(r["component"] for r in p01_next if r["_lesion"] == 3)
    c1_from = next(r["component"] for r in p01 if r["_lesion"] == 1)
    c1_to = next(r["component"] for r in p01_next if r["_lesion"] == 1)
    return ReportFixture(
        out=out, inputs=inputs, known_beta=("P01", 1, "untreated", 0.74, 0.52, 0.96),
        low_confidence_link=("P01", "02", c3_from, "03", c3_to),
        confident_link=("P01", "02", c1_from, "03", c1_to), merged=("P01", 2, 1),
        border_lesion=("P02", 1), non_measurable_lesion=("P01", 3),
        fit_without_interval=("P02", 2, "untreated"), failed_session=("P02", "04"),
        subjects=("P01", "P02", "P03"),
        component_lesion={(r["subject"], r["session"], r["component"]): r["_lesion"]
                          for r in components})
