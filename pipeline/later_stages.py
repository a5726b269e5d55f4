"""Stages 2 and 3 and the report wired to the files in OUT (used by ``workflow``)."""
from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd

from pipeline.config import Config
from pipeline.errors import InputError, UsageError
from pipeline.runner import Stage1, say
from pipeline.tables import read_table, write_sidecar, write_table
from pipeline.io import track_path
from pipeline.sidecars import EVENT_COLUMNS, REGISTRATION_COLUMNS
from pipeline.volumes import LabelledScan


def run_matching(stage: Stage1, out: Path, *, config: Config,
                 corrections: pd.DataFrame | None) -> list[dict]:
    """Stage 2 for every subject; writes matches.tsv, longitudinal.tsv, tracks/. Returns errors."""
    from pipeline import matching
    from pipeline.io import save_label_image

    errors: list[dict] = []
    parts: dict[str, list[pd.DataFrame]] = {"matches": [], "longitudinal": [], "assignment": []}
    registrations: list[dict] = []
    groups = dict(zip(stage.masks.subject, stage.masks.group)) if len(stage.masks) else {}
    known = {s.subject for s in stage.scans}
    if corrections is not None:
        for index, row in corrections[~corrections.subject.isin(known)].iterrows():
            errors.append({"subject": row.subject, "session": row.session, "path": "",
                           "stage": "match", "reason": f"corrections.tsv line {index + 2}: "
                           f"subject {row.subject!r} is not in the input"})
    for subject in sorted(known):
        scans = stage.labelled(subject)
        if not scans:
            continue
        rows = stage.lesions[stage.lesions.subject == subject]
        mine = None if corrections is None else corrections[corrections.subject == subject]
        try:
            transforms = _register(stage, subject, scans, config, registrations) \
                if config.matching.register else None
            try:
                result = matching.match_subject(scans, rows, settings=config.matching,
                                                corrections=mine, transforms=transforms)
            except InputError as exc:     # a bad correction: keep the automatic result
                errors.append({"subject": subject, "session": exc.session or "", "path": "",
                               "stage": "match", "reason": f"{exc}; corrections of this subject "
                               "not applied"})
                result = matching.match_subject(scans, rows, settings=config.matching,
                                                corrections=None, transforms=transforms)
        except (ValueError, KeyError) as exc:
            errors.append({"subject": subject, "session": "", "path": "", "stage": "match",
                           "reason": f"matching failed: {exc}"})
            continue
        for warning in result.warnings:
            say(f"warning: sub {subject}: {warning}")
        parts["matches"].append(result.matches)
        longitudinal = result.longitudinal.copy()
        longitudinal["group"] = groups.get(subject, "")
        parts["longitudinal"].append(longitudinal)
        parts["assignment"].append(result.assignment)
        for scan in scans:
            res = stage.results[(scan.subject, scan.session)]
            image = matching.track_image(scan, result.assignment)
            save_label_image(track_path(out, scan.subject, scan.session), image,
                             res.file_affine, units_code=res.units_code, forms=res.forms,
                             form_codes=res.form_codes)
    for row in errors:
        say(f"error: sub {row['subject']}: {row['reason']}")
    _write_stage2(out, parts)
    if config.matching.register:
        write_table(pd.DataFrame(registrations, columns=list(REGISTRATION_COLUMNS)),
                    out / "registration.tsv", columns=tuple(REGISTRATION_COLUMNS))
        write_sidecar(out / "registration.tsv", REGISTRATION_COLUMNS)
    return errors


def _write_stage2(out: Path, parts: dict[str, list[pd.DataFrame]]) -> None:
    from pipeline import matching

    for name in ("matches", "longitudinal"):
        frames = [f for f in parts[name] if len(f)]
        table = pd.concat(frames, ignore_index=True) if frames else pd.DataFrame(
            columns=_contract_columns(name))
        write_table(table, out / f"{name}.tsv", columns=_contract_columns(name))
        write_sidecar(out / f"{name}.tsv", matching.COLUMNS[f"{name}.tsv"])





def _register(stage: Stage1, subject: str, scans: list[LabelledScan], config: Config,
              rows: list[dict]) -> dict[str, np.ndarray]:
    """Rigid transforms of each session's image onto the subject's first session's image."""
    import nibabel as nib

    from pipeline.registration import rigid_register

    images = {s.session: s.image_path for s in stage.scans if s.subject == subject}
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
                                iterations=config.matching.registration_iterations,
                                bins=config.matching.registration_bins,
                                sampling=config.matching.registration_sampling)
        rows.append({"subject": subject, "session": scan.session,
                     "reference_session": first.session, "quality": result.quality,
                     "quality_before": result.quality_before,
                     "metric_value": result.metric_value,
                     "matrix_ras": " ".join(f"{v:.6g}" for v in result.matrix_ras.ravel())})
        say(f"note: sub {subject} ses {scan.session}: rigid registration quality "
            f"{result.quality:.3f} (before {result.quality_before:.3f})")
        transforms[scan.session] = result.matrix_ras
    return transforms


def _contract_columns(name: str) -> tuple[str, ...]:
    return {
        "matches": ("subject", "session_from", "component_from", "session_to", "component_to",
                    "relation", "overlap", "centroid_distance_mm"),
        "longitudinal": ("subject", "lesion", "session", "day", "volume_mm3", "status",
                         "components"),
        "fits": ("subject", "lesion", "phase", "model", "n_points", "day_start", "day_end",
                 "v0_mm3", "alpha", "beta", "beta_ci_low", "beta_ci_high", "aicc", "note"),
        "group_fits": ("group", "phase", "model", "n_lesions", "n_points", "beta",
                       "beta_ci_low", "beta_ci_high"),
    }[name]


def events_table(path: Path) -> tuple[pd.DataFrame, str]:
    """The events file as a table and its time column ('date' or 'day'); UsageError when it is
    missing or lacks columns (checked before any work by ``run``)."""
    if not Path(path).is_file():
        raise UsageError(f"{path}: events file not found")
    table = read_table(path, text_columns=("subject", "event", "date", "day", "lesion"))
    kind = "date" if "date" in table.columns else "day" if "day" in table.columns else None
    if kind is None or not {"subject", "event"} <= set(table.columns):
        raise UsageError(f"{path}: events table needs columns subject, event and date or day")
    return table, kind


def read_events(path: Path, origins: dict[str, float], known: set[str],
                lesions: set[tuple[str, int]] | None = None) -> tuple[pd.DataFrame, list[dict]]:
    """Events as days from each subject's first session; rows naming unknown subjects refused."""
    from pipeline.inputs import parse_when

    table, kind = events_table(path)
    rows, errors = [], []
    for index, row in table.iterrows():
        where = f"{path.name} row {index + 2}"
        try:
            if row.subject not in known:
                raise ValueError(f"subject {row.subject!r} is not in the input")
            when = round(parse_when(row[kind], kind) - origins.get(row.subject, 0.0), 6)
            # a date without a time stands for the whole day: sessions imaged that day, at any
            # time, belong to the phase before it (contract: imaging precedes treatment)
            boundary = when + 1.0 - 1e-6 if kind == "date" and len(row[kind].strip()) == 10 \
                else when
            lesion = float(row.lesion) if "lesion" in table.columns and row.lesion else np.nan
            if not np.isnan(lesion) and (lesion < 1 or lesion != int(lesion)):
                raise ValueError(f"lesion {row.lesion!r} must be a positive integer")
            if not np.isnan(lesion) and lesions is not None and \
                    (row.subject, int(lesion)) not in lesions:
                raise ValueError(f"subject {row.subject} has no lesion {row.lesion!r}")
        except ValueError as exc:
            errors.append({"subject": row.subject, "session": "", "path": str(path),
                           "stage": "events", "reason": f"{where}: {exc}"})
            continue
        rows.append({"subject": row.subject, "day": boundary, "event": row.event,
                     "lesion": lesion, "day_given": when})
    columns = ["subject", "day", "event", "lesion", "day_given"]
    return pd.DataFrame(rows, columns=columns), errors


def run_fitting(out: Path, *, config: Config, events: pd.DataFrame | None) -> None:
    """Stage 3 on longitudinal.tsv: fits.tsv and group_fits.tsv."""
    from pipeline import groupfit, growth
    from pipeline.api import fit_growth
    from pipeline.sidecars import UNFITTED_COLUMNS

    fits, group_fits, unfitted = fit_growth(read_table(out / "longitudinal.tsv"), events,
                                            config=config)
    write_table(fits, out / "fits.tsv", columns=_contract_columns("fits"))
    write_table(unfitted, out / "unfitted.tsv", columns=tuple(unfitted.columns))
    write_sidecar(out / "unfitted.tsv", UNFITTED_COLUMNS)
    write_table(group_fits, out / "group_fits.tsv", columns=_contract_columns("group_fits"))
    for name, module in (("fits", growth), ("group_fits", groupfit)):
        doc = getattr(module, "COLUMNS", None)
        if isinstance(doc, dict):
            write_sidecar(out / f"{name}.tsv", doc)
    if config.population.enabled:
        _write_population(out, read_table(out / "longitudinal.tsv"), events, config)
    else:                                   # no stale population tables from an earlier run
        for name in ("population_fits", "population_lesions", "group_contrasts", "backtest"):
            for path in (out / f"{name}.tsv", out / f"{name}.json"):
                path.unlink(missing_ok=True)
    if events is not None:
        shown = events.assign(day=events["day_given"], lesion=events["lesion"].astype("Int64"))
        write_table(shown[["subject", "day", "event", "lesion"]], out / "events.tsv",
                    columns=("subject", "day", "event", "lesion"))
        write_sidecar(out / "events.tsv", EVENT_COLUMNS)


def _write_population(out: Path, longitudinal: pd.DataFrame, events: pd.DataFrame | None,
                      config: Config) -> None:
    """population_fits.tsv, population_lesions.tsv, group_contrasts.tsv, backtest.tsv."""
    from pipeline import population

    try:
        tables = population.from_longitudinal(longitudinal, events, config=config)
    except (ValueError, FloatingPointError, np.linalg.LinAlgError) as exc:
        say(f"warning: population model not fitted: {type(exc).__name__}: {exc}")
        return
    for name, table in tables.items():
        write_table(table, out / name, columns=tuple(population.COLUMNS[name]))
        write_sidecar(out / name, population.COLUMNS[name])


def load_provenance(out: Path) -> dict:
    path = out / "provenance.json"
    if not path.exists():
        raise UsageError(f"{out}: no provenance.json; run 'lesion-growth volumes' or 'run' first")
    return json.loads(path.read_text())
