"""Stage 2 of one subject as a task for the executors of ``pipeline.run.executors`` (serial or a
pool).

A task takes everything its subject needs (component images, lesion rows, corrections, settings,
where its track images go), matches, writes the subject's track images and returns the tables,
so that subjects run side by side and the caller only puts the tables together in subject order.
Research use only; see ``pipeline.DISCLAIMER``.
"""
from __future__ import annotations

from dataclasses import dataclass, field
from pathlib import Path

import pandas as pd

import numpy as np

from pipeline.errors import InputError
from pipeline.settings import MatchSettings
from pipeline.volumes.components import LabelledScan


@dataclass(frozen=True, eq=False)
class SubjectJob:
    """One subject's stage-2 inputs (picklable). ``writes`` holds, per scan in ``scans`` order,
    ``(track path, file affine, units code, forms, form codes)`` for ``save_label_image``;
    ``corrections_named`` the corrections file as given and as messages name it."""

    subject: str
    scans: list[LabelledScan]
    rows: pd.DataFrame
    corrections: pd.DataFrame | None
    settings: MatchSettings
    images: dict[str, Path | None]
    writes: tuple[tuple, ...]
    corrections_named: tuple[str, str] = ("", "corrections table")   # (path as given, in text)


@dataclass(frozen=True, eq=False)
class SubjectOutcome:
    """What a task returns: the result (None when matching failed), errors.tsv rows, rows of
    registration.tsv and lines for the person running it."""

    subject: str
    result: object | None
    errors: list[dict] = field(default_factory=list)
    registrations: list[dict] = field(default_factory=list)
    notes: list[str] = field(default_factory=list)
    error: str = ""


def match_task(subject: str, session: str, where: str, job: SubjectJob) -> SubjectOutcome:
    """Match one subject, write its track images, return the tables (``run_tasks`` task: the
    first three arguments name it in a failure).

    Examples
    --------
    >>> import numpy as np
    >>> comp = np.ones((2, 2, 2), np.int32)
    >>> scans = [LabelledScan("01", s, d, comp, (3, 3, 3), (8, 8, 8), np.eye(4))
    ...          for s, d in (("1", 0.0), ("2", 30.0))]
    >>> rows = pd.DataFrame({"subject": "01", "session": ["1", "2"], "component": 1,
    ...                      "volume_mm3": 8.0, "centroid_x_mm": 3.5, "centroid_y_mm": 3.5,
    ...                      "centroid_z_mm": 3.5})
    >>> job = SubjectJob("01", scans, rows, None, MatchSettings(), {}, ())
    >>> outcome = match_task("01", "", "subject 01", job)
    >>> outcome.result.matches["relation"].tolist(), outcome.errors
    (['continues'], [])
    """
    from pipeline.matching import links as matching

    outcome = SubjectOutcome(subject, None)
    settings = job.settings
    try:
        transforms = register_subject(job.images, subject, job.scans, settings,
                                      outcome.registrations, outcome.notes) \
            if settings.register else None
        given, source = job.corrections_named
        try:
            result = matching.match_subject(job.scans, job.rows, settings=settings,
                                            corrections=job.corrections, transforms=transforms,
                                            corrections_source=source)
        except InputError as exc:     # a bad correction: keep the automatic result
            outcome.errors.append({"subject": subject, "session": exc.session or "",
                                   "path": given,
                                   "stage": "match", "reason": f"{exc}; corrections of this "
                                   "subject not applied"})
            result = matching.match_subject(job.scans, job.rows, settings=settings,
                                            corrections=None, transforms=transforms)
    except (ValueError, KeyError) as exc:
        outcome.errors.append({"subject": subject, "session": "", "path": "", "stage": "match",
                               "reason": f"matching failed: {exc}"})
        return outcome
    outcome.notes.extend(f"warning: sub {subject}: {warning}" for warning in result.warnings)
    _write_tracks(job, result.assignment)
    return SubjectOutcome(subject, result, outcome.errors, outcome.registrations, outcome.notes)


def _write_tracks(job: SubjectJob, assignment: pd.DataFrame) -> None:
    from pipeline.io.nifti import save_label_image
    from pipeline.matching.tracks import track_images

    images = track_images(job.scans, assignment)
    for image, (path, file_affine, units_code, forms, form_codes) in zip(images, job.writes):
        # not fsynced: a track image is remade by `match`; the tables stay durable
        save_label_image(path, image, file_affine, units_code=units_code, forms=forms,
                         form_codes=form_codes, durable=False)


def register_subject(images: dict[str, Path | None], subject: str, scans: list[LabelledScan],
                     settings: MatchSettings, rows: list[dict], notes: list[str]
                     ) -> dict[str, np.ndarray]:
    """Rigid transforms of each session's image onto the subject's first session's image."""
    import nibabel as nib

    from pipeline.matching.registration import rigid_register

    first = scans[0]
    if images.get(first.session) is None:
        raise ValueError("matching.register needs an image for every session (manifest 'image')")
    fixed = nib.load(str(images[first.session]))
    transforms = {}
    for scan in scans[1:]:
        path = images.get(scan.session)
        if path is None:
            raise ValueError(f"matching.register: session {scan.session} has no image")
        moving = nib.load(str(path))
        result = rigid_register(np.asanyarray(fixed.dataobj, dtype=np.float32), fixed.affine,
                                np.asanyarray(moving.dataobj, dtype=np.float32), moving.affine,
                                iterations=settings.registration_iterations,
                                bins=settings.registration_bins,
                                sampling=settings.registration_sampling)
        rows.append({"subject": subject, "session": scan.session,
                     "reference_session": first.session, "quality": result.quality,
                     "quality_before": result.quality_before,
                     "metric_value": result.metric_value,
                     "matrix_ras": " ".join(f"{v:.6g}" for v in result.matrix_ras.ravel())})
        notes.append(f"note: sub {subject} ses {scan.session}: rigid registration quality "
                     f"{result.quality:.3f} (before {result.quality_before:.3f})")
        transforms[scan.session] = result.matrix_ras
    return transforms
