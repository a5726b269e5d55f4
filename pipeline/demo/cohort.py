"""Invented demo cohort: a fictional clinic of a dozen patients with brain metastases.

All data are made up by a seeded generator; no real patient contributed anything. Lesion
volumes follow the power law dV/dt = alpha * V^beta (V in mm^3, t in days) piece by piece:
untreated growth (beta 1.2-1.8), decline after treatment, regrowth after a nadir (beta < 1), a
treatment-effect enlargement (beta 2-3, ending well before its finite-time singularity), a split,
a merge, a new lesion, a lesion that vanishes and comes back, sessions on different voxel grids
(oblique and flipped storage included) and one truncated file. ``truth.json`` records what the
pipeline should find. Research use only: :data:`pipeline.DISCLAIMER`.
"""
from __future__ import annotations

import datetime as dt
import json
import os
from concurrent.futures import ThreadPoolExecutor
from dataclasses import dataclass
from pathlib import Path

import numpy as np
import pandas as pd

from pipeline import DISCLAIMER
from pipeline.demo import shapes as synth
from pipeline.demo.stories import (DETECTION_LIMIT_MM3, GAP_MM, MAX_VOLUME_MM3, MIN_DRAWN_MM3,
                                   STORIES, LesionPlan, SubjectPlan)
from pipeline.errors import UsageError
from pipeline.io.tsv import atomic_path, write_table

MANIFEST_COLUMNS = ("subject", "session", "mask", "image", "date", "group", "labels")
EVENT_COLUMNS = ("subject", "date", "event", "lesion")
OUTCOME_COLUMNS = ("subject", "lesion", "outcome")
OUTCOMES = ("local-control", "progression")
AUC_BAND = (0.70, 0.80)        # cohort ROC AUC of untreated beta vs outcome the draw aims at

#: Columns of the demo's input tables (BIDS sidecar style).
COLUMNS: dict[str, dict] = {
    "subject": {"Description": "Invented subject label (no prefix)"},
    "session": {"Description": "Session label (no prefix), in time order"},
    "mask": {"Description": "Lesion label mask, path relative to the manifest folder"},
    "image": {"Description": "Invented T1w-like image on the mask's grid, relative path"},
    "date": {"Description": "Invented ISO 8601 date of the session or event"},
    "group": {"Description": "Invented treatment arm",
              "Levels": {"arm-A": "invented arm A", "arm-B": "invented arm B"}},
    "labels": {"Description": "Mask values that count as lesion (1 enhancing rim, 3 necrotic "
                              "core; 2 is edema, left out); n/a: every non-zero value"},
    "event": {"Description": "Treatment event",
              "Levels": {"radiosurgery": "stereotactic radiosurgery",
                         "chemotherapy": "systemic treatment (all lesions)",
                         "resection": "surgical resection"}},
    "lesion": {"Description": "Lesion id (numbered by first appearance, ties by larger "
                              "volume); n/a: all lesions of the subject"},
    "outcome": {"Description": "Invented lesion outcome",
                "Levels": {"local-control": "no local progression",
                           "progression": "local progression"}},
}


# ------------------------------------------------------------------ building one subject
def build_subject(index: int, *, seed: int) -> SubjectPlan:
    """Plan subject ``index`` (0-based): story, days, grids, lesion shapes and places.

    Depends only on ``seed`` and ``index`` (``numpy.random.default_rng([seed, index])``).

    >>> plan = build_subject(3, seed=7)
    >>> plan.subject, plan.story, len(plan.days), sorted(plan.lesion_ids().values())
    ('C04', 'merge', 6, [1, 2, 3])
    """
    rng = np.random.default_rng([seed, index])
    story = STORIES[index % len(STORIES)]
    days, lesions, events, opts = story(rng)
    start = dt.date(2023, 1, 2) + dt.timedelta(days=int(rng.integers(0, 600)))
    grids = _grids(rng, index, len(days), opts.get("geometry", "mixed"))
    for les in lesions:
        aspect = (1.0, float(rng.uniform(0.75, 1.0)), float(rng.uniform(0.7, 1.0)))
        les.aspect = les.aspect or aspect
        les.rotation = synth.random_rotation(rng)
        les.shear = synth.random_shear(rng)
        direction = rng.standard_normal(3)
        les.direction = direction / np.linalg.norm(direction)
    plan = SubjectPlan(index=index, subject=f"C{index + 1:02d}",
                       group=("arm-A", "arm-B")[index % 2], story=story.__name__.strip("_"),
                       days=days, grids=grids, lesions=lesions, events=events,
                       multilabel=opts["multilabel"],
                       broken_session=len(days) - 1 if opts.get("broken") else None,
                       start_date=start, response=tuple(opts.get("response", ())))
    _place(rng, plan)
    _validate(plan)
    return plan


def _grids(rng: np.random.Generator, index: int, n: int, geometry: str) -> list[synth.Grid]:
    """Baseline 1 mm isotropic RAS; follow-ups 0.9 x 0.9 x 3 mm except one at 1 mm, tilted for
    the oblique subject and stored LAS / LPI for the flipped one; small origin shifts."""
    grids = []
    for s in range(n):
        shift = rng.uniform(-4.0, 4.0, 3)
        thick = s > 0 and s != 1 + index % (n - 1)
        zooms, kind = ((0.9, 0.9, 3.0), "thick") if thick else ((1.0, 1.0, 1.0), "iso")
        codes, degrees = "RAS", (0.0, 0.0, 0.0)
        if s > 0 and geometry == "oblique":
            degrees = (rng.uniform(8, 15), rng.uniform(-6, 6), rng.uniform(-10, 10))
            kind = f"oblique-{kind}"
        elif s > 0 and geometry == "flipped":
            codes = "LAS" if s % 2 else "LPI"
            kind = f"{codes}-{kind}"
        grids.append(synth.make_grid(zooms, axcodes=codes, degrees=degrees, shift_mm=shift,
                                     kind=kind))
    return grids


def _place(rng: np.random.Generator, plan: SubjectPlan, attempts: int = 2000) -> None:
    """Draw lesion positions in the brain until every component keeps its distance."""
    brain = synth.BRAIN_FRACTION * np.asarray(synth.HEAD_SEMI_AXES_MM)
    for _ in range(attempts):
        for les in plan.lesions:
            point = rng.standard_normal(3)
            point *= rng.uniform() ** (1 / 3) / np.linalg.norm(point)
            les.anchor = np.asarray(synth.HEAD_CENTRE_MM) + 0.8 * brain * point
        for les in plan.lesions:
            _arrange(plan, les)
        if synth.layout_ok([[b for les in plan.lesions for b in les.blobs(d)]
                            for d in plan.days], gap_mm=GAP_MM):
            return
    raise RuntimeError(f"demo subject {plan.subject}: no lesion layout found")


def _arrange(plan: SubjectPlan, les: LesionPlan) -> None:
    """Split offsets and merge partner position, from the sizes the lesions reach."""
    def reach(lesion: LesionPlan, volume: float) -> float:
        return synth.reach_mm(volume, lesion.aspect, lesion.shear)
    if les.split is not None:
        day, f = les.split
        vmax = max(les.volume(d) for d in plan.days if d >= day)
        les.split_offsets = (GAP_MM / 2 + reach(les, f * vmax),
                             GAP_MM / 2 + reach(les, (1 - f) * vmax))
    if les.partner is not None:
        prev = max(d for d in plan.days if d < les.merge_day)
        distance = reach(les, les.volume(prev)) + reach(les.partner, les.partner.volume(prev))
        les.partner.anchor = les.anchor + (distance + GAP_MM) * les.direction


def _validate(plan: SubjectPlan) -> None:
    """Refuse a plan that breaks the scenario's promises (volume range, unambiguous ids)."""
    problems = []
    for les in plan.lesions:
        for day in plan.days:
            vols = [b.volume_mm3 for b in les.blobs(day)]
            if any(v < MIN_DRAWN_MM3 or v > MAX_VOLUME_MM3 for v in vols):
                problems.append(f"{les.key} day {day}: volumes {vols}")
            if day in les.hidden and les.volume(day) >= DETECTION_LIMIT_MM3:
                problems.append(f"{les.key} day {day}: hidden but above detection")
        if les.partner is not None:
            prev = max(d for d in plan.days if d < les.merge_day)
            if les.volume(prev) < 1.3 * les.partner.volume(prev):
                problems.append(f"{les.key}: merge survivor not clearly larger")
    firsts: dict[int, list[float]] = {}
    for les in plan.lesions:
        s = plan.first_session(les)
        firsts.setdefault(s, []).append(sum(b.volume_mm3 for b in les.blobs(plan.days[s])))
    for vols in firsts.values():
        ordered = sorted(vols, reverse=True)
        if any(a < 1.4 * b for a, b in zip(ordered, ordered[1:])):
            problems.append(f"first-session volumes too close for a clear order: {ordered}")
    if problems:
        raise RuntimeError(f"demo subject {plan.subject}: " + "; ".join(problems))


# ------------------------------------------------------------------ files and truth
@dataclass(frozen=True)
class DemoInputs:
    """Paths of the demo cohort's tables (all inside the folder given to the generator)."""

    manifest: Path
    events: Path
    outcomes: Path
    truth: Path


def make_demo_inputs(folder: str | Path, *, seed: int = 7, n_subjects: int = 12) -> DemoInputs:
    """Write the invented demo cohort under ``folder``.

    Writes ``masks/sub-<s>_ses-<t>_mask.nii.gz`` (uint8), ``images/sub-<s>_ses-<t>_T1w.nii.gz``
    (int16, same grid), ``manifest.tsv``, ``events.tsv``, ``outcomes.tsv`` and ``truth.json``.
    The same ``seed`` gives byte-identical files, and subject ``k`` does not depend on
    ``n_subjects``. Every twelfth subject (C12, C24, ...) has a deliberately truncated mask.

    Parameters
    ----------
    folder : str or Path
        Output folder (created if needed; files of the same names are replaced).
    seed : int
        Seed of ``numpy.random.default_rng``.
    n_subjects : int
        Number of invented subjects, 1-99; the twelve stories repeat beyond twelve.

    Returns
    -------
    DemoInputs

    Examples
    --------
    >>> import tempfile
    >>> with tempfile.TemporaryDirectory() as folder:
    ...     paths = make_demo_inputs(folder, n_subjects=1)
    ...     print(paths.manifest.read_text().splitlines()[1].split("\\t")[:4])
    ['C01', '01', 'masks/sub-C01_ses-01_mask.nii.gz', 'images/sub-C01_ses-01_T1w.nii.gz']
    """
    if isinstance(n_subjects, bool) or not isinstance(n_subjects, int) \
            or not 1 <= n_subjects <= 99:
        raise UsageError(f"n_subjects must be an integer from 1 to 99; got {n_subjects!r}")
    folder = Path(folder)
    plans = [build_subject(index, seed=seed) for index in range(n_subjects)]
    jobs = [(plan, s) for plan in plans for s in range(len(plan.days))]
    with ThreadPoolExecutor(max_workers=2) as pool:   # numpy and zlib release the GIL
        list(pool.map(lambda job: _write_session(folder, *job, seed=seed), jobs))
    outcomes = draw_outcomes(plans, seed=seed)
    paths = DemoInputs(folder / "manifest.tsv", folder / "events.tsv",
                       folder / "outcomes.tsv", folder / "truth.json")
    write_table(manifest_table(plans), paths.manifest, columns=MANIFEST_COLUMNS)
    write_table(events_table(plans), paths.events, columns=EVENT_COLUMNS)
    write_table(outcomes, paths.outcomes, columns=OUTCOME_COLUMNS)
    with atomic_path(paths.truth) as tmp:
        text = json.dumps(truth_document(plans, outcomes, seed=seed), indent=1)
        tmp.write_text(text + "\n", encoding="utf-8")
    return paths


def file_names(plan: SubjectPlan, s: int) -> tuple[str, str]:
    """Relative mask and image paths of session ``s`` (0-based) of a subject."""
    stem = f"sub-{plan.subject}_ses-{plan.sessions[s]}"
    return f"masks/{stem}_mask.nii.gz", f"images/{stem}_T1w.nii.gz"


def _write_session(folder: Path, plan: SubjectPlan, s: int, *, seed: int) -> None:
    grid = plan.grids[s]
    blobs = [blob for lesion in plan.lesions for blob in lesion.blobs(plan.days[s])]
    rng = np.random.default_rng([seed, plan.index, s, 1])
    mask, image = synth.render(grid, blobs, rng=rng, multilabel=plan.multilabel,
                               bias=rng.uniform(-0.08, 0.08, 3), noise_sd=6.0)
    mask_bytes = synth.nifti_gz_bytes(mask, grid.affine, compresslevel=6)
    if s == plan.broken_session:
        mask_bytes = mask_bytes[: len(mask_bytes) // 2]   # deliberately truncated gzip stream
    mask_path, image_path = file_names(plan, s)
    for rel, raw in ((mask_path, mask_bytes),
                     (image_path, synth.nifti_gz_bytes(image, grid.affine, compresslevel=1))):
        target = folder / rel
        target.parent.mkdir(parents=True, exist_ok=True)
        partial = target.with_name(f".{target.name}.part")   # no fsync: demo data, fast
        partial.write_bytes(raw)
        os.replace(partial, target)


def _date(plan: SubjectPlan, day: float) -> str:
    return (plan.start_date + dt.timedelta(days=int(day))).isoformat()


def manifest_table(plans: list[SubjectPlan]) -> pd.DataFrame:
    """One row per session; ``labels`` is set for the multi-label subjects only."""
    rows = [{"subject": p.subject, "session": p.sessions[s], "mask": file_names(p, s)[0],
             "image": file_names(p, s)[1], "date": _date(p, day), "group": p.group,
             "labels": "1,3" if p.multilabel else None}
            for p in plans for s, day in enumerate(p.days)]
    return pd.DataFrame(rows, columns=list(MANIFEST_COLUMNS))


def events_table(plans: list[SubjectPlan]) -> pd.DataFrame:
    """Treatment events; ``lesion`` is the truth's lesion id, missing for all lesions."""
    rows = [{"subject": p.subject, "date": _date(p, day), "event": event,
             "lesion": None if key is None else str(p.lesion_ids()[key])}
            for p in plans for day, event, key in p.events]
    return pd.DataFrame(rows, columns=list(EVENT_COLUMNS))


def marker_beta(lesion: LesionPlan) -> float:
    """The exponent outcomes are drawn from: beta of the lesion's untreated growth."""
    return next(seg.beta for seg in lesion.segments if seg.phase == "untreated")


def roc_auc(marker: np.ndarray, positive: np.ndarray) -> float:
    """Mann-Whitney estimate of the ROC AUC (ties count one half).

    >>> roc_auc(np.array([0.1, 0.4, 0.35, 0.8]), np.array([False, False, True, True]))
    0.75
    """
    pos, neg = marker[positive], marker[~positive]
    if len(pos) == 0 or len(neg) == 0:
        return float("nan")
    diff = pos[:, None] - neg[None, :]
    return float(((diff > 0).sum() + 0.5 * (diff == 0).sum()) / diff.size)


def draw_outcomes(plans: list[SubjectPlan], *, seed: int, attempts: int = 400) -> pd.DataFrame:
    """One invented outcome per lesion, correlated with its untreated growth exponent.

    A latent score ``z(beta) + N(0, 1)`` marks the top 40 % ``progression``; seeded draws repeat
    until the cohort AUC of beta lies in :data:`AUC_BAND` (else the closest draw is kept).
    """
    keys = [(p.subject, p.lesion_ids()[les.key], marker_beta(les))
            for p in plans for les in p.lesions]
    beta = np.array([k[2] for k in keys])
    z = (beta - beta.mean()) / (beta.std() or 1.0)
    rng = np.random.default_rng([seed, 424242])
    best, best_gap = np.zeros(len(z), bool), np.inf
    for _ in range(attempts):
        latent = z + rng.standard_normal(len(z))
        positive = latent >= np.quantile(latent, 0.6)
        auc = roc_auc(beta, positive)
        gap = 0.0 if AUC_BAND[0] <= auc <= AUC_BAND[1] else min(abs(auc - b) for b in AUC_BAND)
        if gap < best_gap:
            best, best_gap = positive, gap
        if gap == 0.0:
            break
    rows = [{"subject": s, "lesion": str(lid), "outcome": OUTCOMES[int(flag)]}
            for (s, lid, _), flag in zip(keys, best)]
    return pd.DataFrame(rows, columns=list(OUTCOME_COLUMNS))


def _blob_record(blob: synth.Blob) -> dict:
    return {"volume_mm3": blob.volume_mm3, "centroid_mm": synth.blob_centroid(blob).tolist(),
            "centre_mm": list(blob.centre_mm), "semi_axes_mm": list(blob.semi_axes_mm),
            "rotation": list(blob.rotation), "shear": list(blob.shear), "core": blob.core}


def _lesion_rows(plan: SubjectPlan, les: LesionPlan, ids: dict[str, int]) -> list[dict]:
    rows, first = [], plan.first_session(les)
    for s, day in enumerate(plan.days):
        if s < first or s == plan.broken_session:
            continue
        blobs = les.blobs(day)
        merged = les.absorbed_by is not None and day >= les.merge_day
        status = ("merged" if merged else "absent" if not blobs
                  else "new" if s == first and s > 0 else "present")
        rows.append({
            "session": plan.sessions[s], "day": day, "status": status,
            "volume_mm3": None if merged else sum(b.volume_mm3 for b in blobs),
            "law_volume_mm3": les.volume(day), "components": len(blobs),
            "merged_into": ids[les.absorbed_by.key] if merged else None,
            "merged_from": [ids[les.partner.key]] if les.partner is not None
            and day >= les.merge_day else [],
            "blobs": [_blob_record(b) for b in blobs]})
    return rows


def subject_truth(plan: SubjectPlan, outcome: dict[tuple[str, int], str]) -> dict:
    """The truth of one subject: sessions, events, lesions (ids, laws, per-session rows)."""
    ids = plan.lesion_ids()
    expected: dict[str, list] = {"splits": [], "merges": [], "new": [], "vanish": [],
                                 "response": [{"session": s, "category": c}
                                              for s, c in zip(plan.sessions, plan.response)]}
    lesions = {}
    for les in sorted(plan.lesions, key=lambda item: ids[item.key]):
        lid, rows = ids[les.key], _lesion_rows(plan, les, ids)
        by_day = {r["day"]: r["session"] for r in rows}
        if les.split is not None:
            expected["splits"].append({"lesion": lid, "session": by_day[les.split[0]]})
        if les.partner is not None:
            expected["merges"].append({"lesion": lid, "absorbed": [ids[les.partner.key]],
                                       "session": by_day[les.merge_day]})
        if plan.first_session(les) > 0:
            expected["new"].append({"lesion": lid, "session": rows[0]["session"]})
        for day in les.hidden:
            back = next(r["session"] for r in rows if r["day"] > day and r["components"])
            expected["vanish"].append({"lesion": lid, "absent_sessions": [by_day[day]],
                                       "returns_session": back})
        lesions[str(lid)] = {
            "key": les.key, "first_session": plan.sessions[plan.first_session(les)],
            "phases": [seg.record() for seg in les.segments], "marker_beta": marker_beta(les),
            "outcome": outcome.get((plan.subject, lid)), "resection_day": les.resection_day,
            "split_day": les.split[0] if les.split else None, "merge_day": les.merge_day,
            "sessions": rows}
    sessions = [{"session": plan.sessions[s], "day": day, "grid": g.kind, "shape": list(g.shape),
                 "affine": g.affine.tolist(), "voxel_volume_mm3": g.voxel_volume_mm3,
                 "mask": file_names(plan, s)[0], "image": file_names(plan, s)[1],
                 "readable": s != plan.broken_session}
                for s, (day, g) in enumerate(zip(plan.days, plan.grids))]
    events = [{"day": day, "event": event, "lesion": None if key is None else ids[key]}
              for day, event, key in plan.events]
    return {"group": plan.group, "story": plan.story, "labels": "1,3" if plan.multilabel else None,
            "sessions": sessions, "events": events, "lesions": lesions, "expected": expected}


def truth_document(plans: list[SubjectPlan], outcomes: pd.DataFrame, *, seed: int) -> dict:
    """Everything the pipeline should find, ready for JSON."""
    outcome = {(r.subject, int(r.lesion)): r.outcome for r in outcomes.itertuples()}
    subjects = {p.subject: subject_truth(p, outcome) for p in plans}
    expected: dict[str, list] = {"splits": [], "merges": [], "new": [], "vanish": [],
                                 "response": [], "errors": []}
    for name, doc in subjects.items():
        for kind in ("splits", "merges", "new", "vanish", "response"):
            expected[kind] += [{"subject": name, **item} for item in doc["expected"][kind]]
        expected["errors"] += [{"subject": name, "session": s["session"], "path": s["mask"]}
                               for s in doc["sessions"] if not s["readable"]]
    positive = outcomes.outcome.to_numpy() == "progression"
    betas = np.array([marker_beta(les) for p in plans for les in p.lesions])
    return {"description": "Invented demo cohort for lesion-growth; no real patient data.",
            "disclaimer": DISCLAIMER, "seed": seed, "n_subjects": len(plans),
            "units": {"volume": "mm^3", "day": "days from the subject's first session",
                      "position": "RAS+ world mm", "alpha": "mm^(3(1-beta)) per day",
                      "k_per_day": "1/day, alpha * v0^(beta-1)"},
            "law": "dV/dt = alpha V^beta; V(t) = [v0^(1-beta) + alpha (1-beta) (t - day_start)]"
                   "^(1/(1-beta)), beta = 1: v0 exp(alpha (t - day_start))",
            "detection_limit_mm3": DETECTION_LIMIT_MM3, "min_drawn_mm3": MIN_DRAWN_MM3,
            "cohort_auc_beta": roc_auc(betas, positive),
            "subjects": subjects, "expected": expected}
