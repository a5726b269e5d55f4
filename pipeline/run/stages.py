"""Stages 2 and 3 and the report wired to the files in OUT (used by ``workflow``)."""
from __future__ import annotations

import json
from pathlib import Path

import numpy as np
import pandas as pd

from pipeline.config import Config
from pipeline.errors import UsageError
from pipeline.run.stage1 import Stage1, say
from pipeline.io.tsv import read_table
from pipeline.run.catalog import empty, write_output
from pipeline.io.names import track_path
from pipeline.run.sidecars import EVENT_COLUMNS, REGISTRATION_COLUMNS
from pipeline.volumes.components import LabelledScan


def run_matching(stage: Stage1, out: Path, *, config: Config,
                 corrections: pd.DataFrame | None, corrections_path: Path | None = None,
                 workers: int = 1) -> list[dict]:
    """Stage 2 for every subject; writes matches.tsv, longitudinal.tsv, tracks/. Returns errors.

    Subjects are independent: each is one task (match, optional registration, its track images)
    run by the executors of stage 1 (``workers`` as for ``volumes``); the tables are put together
    in subject order, so they do not depend on the number of workers. Errors about corrections
    name ``corrections_path`` (the file as given) and its line."""
    from pipeline.run.executors import run_tasks

    errors: list[dict] = []
    groups = dict(zip(stage.masks.subject, stage.masks.group)) if len(stage.masks) else {}
    known = {s.subject for s in stage.scans}
    given = "" if corrections_path is None else str(corrections_path)
    source = given or "corrections table"
    if corrections is not None:
        for index, row in corrections[~corrections.subject.isin(known)].iterrows():
            errors.append({"subject": row.subject, "session": row.session, "path": given,
                           "stage": "match", "reason": f"{source} line {index + 2}: "
                           f"subject {row.subject!r} is not in the input"})
    subjects, jobs = _subject_jobs(stage, out, sorted(known), config, corrections,
                                   (given, source))
    outcomes = dict(run_tasks(jobs, workers=workers if len(jobs) > 1 else 1))   # no pool for one
    parts: dict[str, list[pd.DataFrame]] = {"matches": [], "longitudinal": [], "assignment": []}
    registrations: list[dict] = []
    for index, subject in enumerate(subjects):
        outcome = outcomes[index]
        if getattr(outcome, "error", ""):     # the task itself failed (a ScanResult)
            errors.append({"subject": subject, "session": "", "path": "", "stage": "match",
                           "reason": f"matching failed: {outcome.error}"})
            continue
        for line in outcome.notes:
            say(line)
        errors.extend(outcome.errors)
        registrations.extend(outcome.registrations)
        if outcome.result is None:
            continue
        parts["matches"].append(outcome.result.matches)
        longitudinal = outcome.result.longitudinal.copy()
        longitudinal["group"] = groups.get(subject, "")
        parts["longitudinal"].append(longitudinal)
        parts["assignment"].append(outcome.result.assignment)
    for row in errors:
        say(f"error: sub {row['subject']}: {row['reason']}")
    _write_stage2(out, parts)
    if config.matching.register:
        write_output(out, "registration.tsv",
                     pd.DataFrame(registrations, columns=list(REGISTRATION_COLUMNS)))
    return errors


def _subject_jobs(stage: Stage1, out: Path, known: list[str], config: Config,
                  corrections: pd.DataFrame | None, named: tuple[str, str]
                  ) -> tuple[list[str], list[tuple]]:
    """The subjects with scans to match and one ``run_tasks`` task for each; ``named`` is the
    corrections file as given and how messages name it."""
    from pipeline.run.stage2_tasks import SubjectJob, match_task

    labelled = _labelled_by_subject(stage)
    rows_of = dict(iter(stage.lesions.groupby("subject", sort=False))) \
        if len(stage.lesions) else {}
    mine_of = {} if corrections is None else dict(iter(corrections.groupby("subject",
                                                                             sort=False)))
    empty = stage.lesions.iloc[:0]
    images = {(s.subject, s.session): s.image_path for s in stage.scans}
    subjects = [subject for subject in known if labelled.get(subject)]
    jobs = []
    for subject in subjects:
        scans = labelled[subject]
        mine = None if corrections is None else mine_of.get(subject, corrections.iloc[:0])
        writes = tuple(_track_write(stage, out, scan) for scan in scans)
        job = SubjectJob(subject, scans, rows_of.get(subject, empty), mine, config.matching,
                         {s.session: images.get((subject, s.session)) for s in scans}, writes,
                         named)
        jobs.append((match_task, (subject, "", f"subject {subject}", job)))
    return subjects, jobs


def _labelled_by_subject(stage: Stage1) -> dict[str, list[LabelledScan]]:
    """``stage.labelled(subject)`` for every subject in one pass over the scans."""
    out: dict[str, list[LabelledScan]] = {}
    for scan in sorted(stage.scans, key=lambda s: (s.day, s.session)):
        result = stage.results.get(scan.key)
        if not scan.error and result is not None and result.ok:
            out.setdefault(scan.subject, []).append(LabelledScan(
                scan.subject, scan.session, scan.day, result.component_image(), result.offset,
                result.shape, result.affine))
    return out


def _track_write(stage: Stage1, out: Path, scan: LabelledScan) -> tuple:
    res = stage.results[(scan.subject, scan.session)]
    return (track_path(out, scan.subject, scan.session), res.file_affine, res.units_code,
            res.forms, res.form_codes)


def _write_stage2(out: Path, parts: dict[str, list[pd.DataFrame]]) -> None:
    for name, part in (("matches.tsv", "matches"), ("longitudinal.tsv", "longitudinal"),
                       ("lesion_components.tsv", "assignment")):   # component -> lesion
        frames = [f for f in parts[part] if len(f)]
        write_output(out, name, pd.concat(frames, ignore_index=True) if frames else empty(name))


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


#: An event further than this from a subject's follow-up (days) is warned about.
FAR_FROM_FOLLOW_UP_DAYS = 365.25


def read_events(path: Path, origins: dict[str, float], known: set[str],
                lesions: set[tuple[str, int]] | None = None, *, manifest_kind: str = "date",
                follow_up: dict[str, tuple[float, float]] | None = None,
                warnings: list[str] | None = None) -> tuple[pd.DataFrame, list[dict]]:
    """Events as days from each subject's first session; rows naming unknown subjects refused.

    An events ``day`` is in the manifest's ``day`` reference when the manifest gives days, and
    counts from the subject's first session when the manifest gives dates. Event dates with a
    manifest of days cannot be placed: the whole file is refused with one error row. Events
    further than :data:`FAR_FROM_FOLLOW_UP_DAYS` from a subject's ``follow_up`` (first and last
    session day) add a line to ``warnings``.
    """
    table, kind = events_table(path)
    columns = ["subject", "day", "event", "lesion", "day_given"]
    if kind == "date" and manifest_kind == "day":
        return pd.DataFrame(columns=columns), [{
            "subject": "", "session": "", "path": str(path), "stage": "events",
            "reason": f"{path.name}: events give dates but the manifest gives days from its own "
                      "reference, so no event can be placed; give the events a 'day' column in "
                      "the manifest's reference"}]
    rows, errors = [], []
    for index, row in table.iterrows():
        where = f"{path.name} row {index + 2}"
        try:
            rows.append(_event_row(row, kind, manifest_kind, origins, known, lesions,
                                   "lesion" in table.columns))
        except ValueError as exc:
            errors.append({"subject": row.subject, "session": "", "path": str(path),
                           "stage": "events", "reason": f"{where}: {exc}"})
            continue
        span = (follow_up or {}).get(row.subject)
        if span and warnings is not None and not (
                span[0] - FAR_FROM_FOLLOW_UP_DAYS <= rows[-1]["day_given"]
                <= span[1] + FAR_FROM_FOLLOW_UP_DAYS):
            warnings.append(f"{where}: event day {rows[-1]['day_given']:g} of subject "
                            f"{row.subject} lies more than {FAR_FROM_FOLLOW_UP_DAYS:g} days "
                            f"outside its sessions (days {span[0]:g} to {span[1]:g}); check "
                            "the day the events count from")
    return pd.DataFrame(rows, columns=columns), errors


def _event_row(row: pd.Series, kind: str, manifest_kind: str, origins: dict[str, float],
               known: set[str], lesions: set[tuple[str, int]] | None, has_lesion: bool) -> dict:
    """One events row as days from the subject's first session (ValueError when unusable)."""
    from pipeline.inputs.manifest import parse_when

    if row.subject not in known:
        raise ValueError(f"subject {row.subject!r} is not in the input")
    value = parse_when(row[kind], kind)
    # a day with a dated manifest already counts from the subject's first session (README)
    shift = 0.0 if kind == "day" and manifest_kind == "date" else origins.get(row.subject, 0.0)
    when = round(value - shift, 6)
    # a date without a time stands for the whole day: sessions imaged that day, at any
    # time, belong to the phase before it (docs/outputs.md §5.4: imaging precedes treatment)
    boundary = when + 1.0 - 1e-6 if kind == "date" and len(row[kind].strip()) == 10 else when
    lesion = float(row.lesion) if has_lesion and row.lesion else np.nan
    if not np.isnan(lesion) and (lesion < 1 or lesion != int(lesion)):
        raise ValueError(f"lesion {row.lesion!r} must be a positive integer")
    if not np.isnan(lesion) and lesions is not None and \
            (row.subject, int(lesion)) not in lesions:
        raise ValueError(f"subject {row.subject} has no lesion {row.lesion!r}")
    return {"subject": row.subject, "day": boundary, "event": row.event, "lesion": lesion,
            "day_given": when}


def run_fitting(out: Path, *, config: Config, events: pd.DataFrame | None) -> None:
    """Stage 3 on longitudinal.tsv: fits.tsv and group_fits.tsv."""
    from pipeline.growth.stage import fit_growth

    fits, group_fits, unfitted = fit_growth(read_table(out / "longitudinal.tsv"), events,
                                            config=config)
    write_output(out, "fits.tsv", fits)
    write_output(out, "unfitted.tsv", unfitted)
    write_output(out, "group_fits.tsv", group_fits)
    if config.population.enabled:
        _write_population(out, read_table(out / "longitudinal.tsv"), events, config)
    else:                                   # no stale population tables from an earlier run
        for name in POPULATION_TABLES:
            for path in (out / name, (out / name).with_suffix(".json")):
                path.unlink(missing_ok=True)
    if events is not None:
        shown = events.assign(day=events["day_given"], lesion=events["lesion"].astype("Int64"))
        write_output(out, "events.tsv", shown[list(EVENT_COLUMNS)])
    if config.response.write:
        _write_response(out, config=config, events=events)


def _write_response(out: Path, *, config: Config, events: pd.DataFrame | None) -> None:
    """response.tsv and response_subjects.tsv (target-lesion radiographic component only)."""
    from pipeline.growth import response

    if not (out / "lesion_components.tsv").exists():
        say(f"note: {out.name}: no lesion_components.tsv (run 'match' again); response.tsv "
            "not written")
        return
    measures = response.lesion_measures(
        read_table(out / "longitudinal.tsv"), read_table(out / "lesions.tsv"),
        read_table(out / "lesion_components.tsv"))
    table = response.assess_response(measures, events, settings=config.response)
    write_output(out, "response.tsv", table)
    write_output(out, "response_subjects.tsv", response.summarize_response(table))


#: The population model's tables (pipeline.growth.population).
POPULATION_TABLES = ("population_fits.tsv", "population_lesions.tsv", "group_contrasts.tsv",
                     "backtest.tsv")


def _write_population(out: Path, longitudinal: pd.DataFrame, events: pd.DataFrame | None,
                      config: Config) -> None:
    """population_fits.tsv, population_lesions.tsv, group_contrasts.tsv, backtest.tsv."""
    from pipeline.growth import population

    try:
        tables = population.from_longitudinal(longitudinal, events, config=config)
    except (ValueError, FloatingPointError, np.linalg.LinAlgError) as exc:
        say(f"warning: population model not fitted: {type(exc).__name__}: {exc}")
        return
    for name, table in tables.items():
        write_output(out, name, table)


def load_provenance(out: Path) -> dict:
    path = out / "provenance.json"
    if not path.exists():
        raise UsageError(f"{out}: no provenance.json; run 'lesion-growth volumes' or 'run' first")
    return json.loads(path.read_text())
