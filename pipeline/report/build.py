"""The QA report: read what is in OUT, draw figures, write one self-contained ``report.html``.

The report never recomputes a stage: volumes, links, tracks and fits are shown as the tables in
OUT hold them. It reads ``lesions.tsv``, ``masks.tsv``, ``matches.tsv``, ``longitudinal.tsv``,
``fits.tsv``, ``group_fits.tsv``, ``errors.tsv``, ``evaluation.tsv`` and ``events.tsv`` (both
optional), ``tracks/`` and ``provenance.json``; any of them may be missing and the page says so.

The page is also the QA tool: beside each link and component a reviewer can mark the link wrong
or move the component to another lesion, and save ``corrections.tsv`` (columns subject session
component lesion note) for ``lesion-growth match OUT --corrections``.
"""
from __future__ import annotations

import math
from collections.abc import Sequence
from pathlib import Path

import numpy as np
import pandas as pd

from pipeline import DISCLAIMER, __version__
from pipeline.report.data import (ReportInputs, ScanCache, as_number, component_lesions, is_true,
                                  lesion_centres, load_inputs, subject_rows)
from pipeline.report.figures import (SlicePanel, axial_crop, beta_figure, lesion_slices_figure,
                                     timeline_figure)
from pipeline.report.html import Flag, LesionView, PageView, SubjectView, number, render_page, slug
from pipeline.settings import ReportSettings
from pipeline.io.tsv import write_text

#: Order of the kinds of flagged items on the page.
FLAG_KINDS = ("Failed inputs", "Low-confidence links", "Merges", "Fits without interval or "
              "with notes", "Touching the scan border", "Not measurable (RANO-BM)")
_LINK_FLAG_COLUMNS = ("flag", "flags", "review", "low_confidence")


def write_report(out_dir: str | Path, *, settings: ReportSettings = ReportSettings(),
                 out_of_date: Sequence[str] = ()) -> Path:
    """Write ``OUT/report.html`` from what is in ``out_dir`` and return its path.

    Parameters
    ----------
    out_dir : str or Path
        The output folder of a run. Missing inputs are named on the page, never an error.
    settings : ReportSettings
        Panel cap, low-overlap threshold, slice window (mm) and figure resolution.

    Returns
    -------
    Path
        ``out_dir / "report.html"``, written atomically.

    Examples
    --------
    >>> import tempfile
    >>> path = write_report(tempfile.mkdtemp())
    >>> "fits.tsv is missing" in path.read_text(encoding="utf-8")
    True
    """
    out = Path(out_dir)
    html_text = render_report(out, settings=settings, out_of_date=out_of_date)
    path = out / "report.html"
    write_text(path, html_text)
    return path


def render_report(out_dir: str | Path, *, settings: ReportSettings = ReportSettings(),
                  out_of_date: Sequence[str] = ()) -> str:
    """The report page for ``out_dir`` as a string (what :func:`write_report` writes)."""
    inputs = load_inputs(out_dir, out_of_date=out_of_date)
    subjects, flags, budget = [], _failure_flags(inputs), settings.max_lesion_panels
    for subject in subject_ids(inputs):
        view, subject_flags, budget = _subject_view(inputs, subject, settings, budget)
        subjects.append(view)
        flags += subject_flags
    flags.sort(key=lambda f: FLAG_KINDS.index(f.kind))
    fits = inputs.table("fits.tsv")
    power = fits[fits["model"].astype(str) == "power"] if "model" in fits else fits.iloc[0:0]
    betas = pd.to_numeric(power.get("beta", pd.Series(dtype=float)), errors="coerce")
    groups = inputs.table("group_fits.tsv")
    page = PageView(
        disclaimer=DISCLAIMER, version=__version__, problems=inputs.problems,
        summary=cohort_summary(inputs), groups=groups,
        beta_figure=beta_figure(betas.dropna().tolist(), groups, dpi=settings.figure_dpi),
        flags=flags, errors=inputs.table("errors.tsv"),
        evaluation=None if "evaluation.tsv" in inputs.problems else inputs.table(
            "evaluation.tsv"),
        subjects=subjects, run_details=_run_details(inputs.provenance))
    return render_page(page)


def subject_ids(inputs: ReportInputs) -> list[str]:
    """Every subject named in any table, in order of first appearance (masks.tsv first)."""
    seen: dict[str, None] = {}
    for name in ("masks.tsv", "lesions.tsv", "longitudinal.tsv", "errors.tsv", "fits.tsv"):
        frame = inputs.table(name)
        if "subject" in frame:
            seen.update((str(s), None) for s in frame["subject"] if str(s))
    return list(seen)


def cohort_summary(inputs: ReportInputs) -> list[tuple[str, str]]:
    """(label, value) pairs of the cohort summary."""
    def count(name: str, value) -> str:
        return f"n/a ({name} not available)" if name in inputs.problems else str(value())
    masks, lesions = inputs.table("masks.tsv"), inputs.table("lesions.tsv")
    longitudinal, fits = inputs.table("longitudinal.tsv"), inputs.table("fits.tsv")
    fitted = fits[pd.to_numeric(fits.get("beta"), errors="coerce").notna()] \
        if "beta" in fits else fits.iloc[0:0]
    with_ci = fitted[pd.to_numeric(fitted.get("beta_ci_low"), errors="coerce").notna()
                     & pd.to_numeric(fitted.get("beta_ci_high"), errors="coerce").notna()] \
        if {"beta_ci_low", "beta_ci_high"} <= set(fitted.columns) else fitted.iloc[0:0]
    return [
        ("Subjects", str(len(subject_ids(inputs)))),
        ("Sessions read", count("masks.tsv", lambda: len(masks))),
        ("Lesion components (all sessions)", count("lesions.tsv", lambda: len(lesions))),
        ("Lesion tracks", count("longitudinal.tsv", lambda: len(
            longitudinal[["subject", "lesion"]].drop_duplicates()) if len(longitudinal) else 0)),
        ("Failed inputs", count("errors.tsv", lambda: len(inputs.table("errors.tsv")))),
        ("Fitted lesion phases with a beta", count("fits.tsv", lambda: len(fitted))),
        ("… of which with an interval", count("fits.tsv", lambda: len(with_ci))),
    ]


def _run_details(provenance: dict) -> list[tuple[str, str]]:
    """Short facts of provenance.json: scalars at the top level and one level down, without
    paths, checksums, the configuration or the per-scan list."""
    skip = ("path", "sha", "disclaimer", "files", "scans", "configuration", "config", "inputs")
    details = []
    for key, value in provenance.items():
        if any(s in key for s in skip):
            continue
        if isinstance(value, dict):
            details += [(f"{key} {k}", str(v)) for k, v in value.items()
                        if isinstance(v, (str, int, float)) and not any(s in k for s in skip)]
        elif isinstance(value, (str, int, float)):
            details.append((str(key), str(value)))
    return details


def _failure_flags(inputs: ReportInputs) -> list[Flag]:
    flags = []
    for _, row in inputs.table("errors.tsv").iterrows():
        where = f"session {row.get('session')}" if row.get("session") else "input"
        flags.append(Flag(FLAG_KINDS[0], str(row.get("subject", "")) or "(no subject)",
                          f"{where} ({row.get('stage', '')}): {row.get('reason', '')}",
                          "failures"))
    return flags


def _subject_view(inputs: ReportInputs, subject: str, settings: ReportSettings,
                  budget: int) -> tuple[SubjectView, list[Flag], int]:
    cache = ScanCache(inputs, subject)
    lesions = subject_rows(inputs.table("lesions.tsv"), subject)
    matches = subject_rows(inputs.table("matches.tsv"), subject)
    mapping = component_lesions(lesions, cache, matches) if len(lesions) else {}
    longitudinal = subject_rows(inputs.table("longitudinal.tsv"), subject)
    fits = subject_rows(inputs.table("fits.tsv"), subject)
    events = subject_rows(inputs.table("events.tsv"), subject)
    ids = sorted({int(v) for v in pd.to_numeric(longitudinal.get("lesion", pd.Series(
        dtype=float)), errors="coerce").dropna()} | set(mapping.values()))
    links = _links(matches, mapping, subject, settings)
    flags = (_link_flags(links, subject) + _merge_flags(longitudinal, links, subject)
             + _fit_flags(fits, subject) + _component_flags(lesions, mapping, subject))
    views = []
    for lesion in ids:
        draw = budget > 0
        budget -= int(draw)
        views.append(_lesion_view(cache, subject, lesion, lesions, mapping, longitudinal, fits,
                                  flags, settings, draw=draw))
    known = pd.Series([(str(r["session"]), int(r["component"])) in mapping
                       for _, r in lesions.iterrows()], index=lesions.index, dtype=bool)
    notes = ()
    if len(lesions) and not mapping:
        notes = ("The lesion of each component is unknown (no track images and no lesion "
                 "column in lesions.tsv).",)
    view = SubjectView(subject=subject, anchor=slug("subject", subject),
                       timeline=timeline_figure(longitudinal, fits, events,
                                                dpi=settings.figure_dpi)
                       if len(longitudinal) else None,
                       links=links, lesions=tuple(views), unassigned=lesions[~known],
                       lesion_ids=tuple(ids), notes=notes)
    return view, flags, budget


def _links(matches: pd.DataFrame, mapping: dict, subject: str,
           settings: ReportSettings) -> pd.DataFrame:
    """matches.tsv rows of one subject with lesion ids, a flag, why, and a page anchor.

    A link is flagged when matches.tsv marks it (``review`` or ``flag`` columns, reason from
    ``review_reason``); a matches.tsv without such columns falls back to overlap below
    ``settings.low_overlap``.
    """
    if matches.empty:
        return pd.DataFrame()
    marks = [c for c in _LINK_FLAG_COLUMNS if c in matches]
    rows = []
    for _, row in matches.iterrows():
        key_from = (str(row["session_from"]), int(row["component_from"]))
        key_to = (str(row["session_to"]), int(row["component_to"]))
        if marks:
            reasons = [str(row.get("review_reason") or "") or f"marked in matches.tsv ({c})"
                       for c in marks if _marked(row[c])][:1]
        else:
            overlap = as_number(row.get("overlap"))
            reasons = ([f"overlap {overlap:.2f} below {settings.low_overlap:g}"]
                       if math.isfinite(overlap) and overlap < settings.low_overlap else [])
        rows.append({**row.to_dict(), "lesion_from": mapping.get(key_from, "?"),
                     "lesion_to": mapping.get(key_to, "?"), "flagged": bool(reasons),
                     "why": "; ".join(reasons + (["corrected by QA"] if is_true(
                         row.get("corrected", False)) else [])),
                     "anchor": slug("link", subject, *key_from, *key_to)})
    return pd.DataFrame(rows)


def _marked(value: object) -> bool:
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    text = str(value).strip().lower()
    return text not in ("", "false", "0", "no", "n/a", "none", "nan")


def _lesion_anchor(subject: str, lesion: object) -> str:
    return slug("lesion", subject, lesion)


def _link_flags(links: pd.DataFrame, subject: str) -> list[Flag]:
    if links.empty:
        return []
    return [Flag(FLAG_KINDS[1], subject,
                 f"session {r['session_from']} component {r['component_from']} → session "
                 f"{r['session_to']} component {r['component_to']} (lesion {r['lesion_to']}): "
                 f"{r['why']}", r["anchor"]) for _, r in links[links["flagged"]].iterrows()]


def _merge_flags(longitudinal: pd.DataFrame, links: pd.DataFrame, subject: str) -> list[Flag]:
    if "status" in longitudinal:
        merged = longitudinal[longitudinal["status"].astype(str) == "merged"]
        merged = merged.sort_values("day").drop_duplicates("lesion")
        return [Flag(FLAG_KINDS[2], subject, f"lesion {number(r['lesion'])} merged into lesion "
                     f"{r.get('merged_into') or '?'} at session {r['session']}",
                     _lesion_anchor(subject, number(r["lesion"])))
                for _, r in merged.iterrows()]
    if links.empty or "relation" not in links:
        return []
    merges = links[links["relation"].astype(str) == "merges"]
    return [Flag(FLAG_KINDS[2], subject, f"session {r['session_from']} component "
                 f"{r['component_from']} merges into session {r['session_to']} component "
                 f"{r['component_to']}", r["anchor"]) for _, r in merges.iterrows()]


def _fit_flags(fits: pd.DataFrame, subject: str) -> list[Flag]:
    """Power-law fits with a beta but no interval, and notes of each lesion and phase's best
    row (every row when fits.tsv has no ``best`` column)."""
    if fits.empty:
        return []
    flags = []
    frame = fits if "phase" in fits else fits.assign(phase="")
    for (lesion, phase), rows in frame.groupby(["lesion", "phase"], sort=False):
        texts = []
        for _, row in rows.iterrows():
            beta = as_number(row.get("beta"))
            lo, hi = as_number(row.get("beta_ci_low")), as_number(row.get("beta_ci_high"))
            if str(row.get("model", "power")) == "power" and math.isfinite(beta) \
                    and not (math.isfinite(lo) and math.isfinite(hi)):
                texts.append(f"power beta {beta:.2f} without interval")
        noted = rows[[is_true(b) for b in rows["best"]]] if "best" in rows else rows
        notes = dict.fromkeys(str(n) for n in noted.get("note", pd.Series(dtype=str)) if str(n))
        texts += [f"note: {n}" for n in notes]
        if texts:
            flags.append(Flag(FLAG_KINDS[3], subject, f"lesion {number(lesion)}, phase "
                              f"{phase}: " + "; ".join(texts),
                              _lesion_anchor(subject, number(lesion))))
    return flags


def _component_flags(lesions: pd.DataFrame, mapping: dict, subject: str) -> list[Flag]:
    flags = []
    for column, wanted, kind, what in (("touches_border", True, FLAG_KINDS[4],
                                        "touches the scan border"),
                                       ("measurable", False, FLAG_KINDS[5],
                                        "is not measurable (RANO-BM)")):
        if column not in lesions:
            continue
        hit = lesions[[is_true(v) == wanted and v is not None for v in lesions[column]]]
        by_lesion: dict[object, list[str]] = {}
        for _, row in hit.iterrows():
            key = (str(row["session"]), int(row["component"]))
            if key in mapping:
                by_lesion.setdefault(mapping[key], []).append(key[0])
            else:
                flags.append(Flag(kind, subject, f"session {key[0]} component {key[1]} {what}",
                                  slug("subject", subject)))
        flags += [Flag(kind, subject, f"lesion {lesion} {what} at session(s) "
                       f"{', '.join(dict.fromkeys(sessions))}", _lesion_anchor(subject, lesion))
                  for lesion, sessions in by_lesion.items()]
    return flags


def _lesion_view(cache: ScanCache, subject: str, lesion: int, lesions: pd.DataFrame,
                 mapping: dict, longitudinal: pd.DataFrame, fits: pd.DataFrame,
                 flags: list[Flag], settings: ReportSettings, *, draw: bool) -> LesionView:
    anchor = _lesion_anchor(subject, lesion)
    rows = longitudinal[pd.to_numeric(longitudinal["lesion"], errors="coerce") == lesion] \
        if "lesion" in longitudinal else longitudinal
    rows = rows.sort_values("day") if "day" in rows else rows
    keys = [(str(r["session"]), int(r["component"])) for _, r in lesions.iterrows()]
    components = lesions[[mapping.get(k) == lesion for k in keys]] if len(lesions) else lesions
    if rows.empty and len(components):
        rows = components.groupby("session", as_index=False, sort=False).agg(
            day=("day", "first"), volume_mm3=("volume_mm3", "sum"),
            components=("component", "size")).assign(status="present").sort_values("day")
    sessions = [(str(r["session"]), r.get("day"), str(r.get("status", "")))
                for _, r in rows.iterrows()]
    own_fits = fits[pd.to_numeric(fits["lesion"], errors="coerce") == lesion] \
        if "lesion" in fits else fits.iloc[0:0]
    if draw:
        figure, caption = _slices(cache, lesion, sessions, settings)
    else:
        figure, caption = None, (f"Slices not drawn: the report shows at most "
                                 f"{settings.max_lesion_panels} lesions with slices "
                                 "(max_lesion_panels).")
    return LesionView(subject=subject, lesion=lesion, anchor=anchor,
                      summary=_lesion_summary(sessions), sessions=rows, components=components,
                      fits=own_fits, figure=figure, caption=caption,
                      flags=tuple(f.text for f in flags if f.anchor == anchor))


def _lesion_summary(sessions: list[tuple[str, object, str]]) -> str:
    if not sessions:
        return "No sessions recorded for this lesion."
    first, last = sessions[0], sessions[-1]
    return (f"Seen from session {first[0]} (day {number(first[1])}, {first[2] or 'present'}) "
            f"to session {last[0]} (day {number(last[1])}, {last[2] or 'present'}); "
            f"{len(sessions)} session(s).")


def _slices(cache: ScanCache, lesion: int, sessions: list[tuple[str, object, str]],
            settings: ReportSettings) -> tuple[str | None, str]:
    names = [s for s, _, _ in sessions]
    centres, radius = lesion_centres(cache, lesion, names)
    if not centres:
        return None, "No slices: this lesion is not found in any track image in tracks/."
    half = max(settings.slice_window_mm / 2.0, 2.0 * radius)
    panels, backgrounds = [], {}
    for index, (session, day, status) in enumerate(sessions):
        title = f"{session} · day {number(day)}\n{status}"
        scan = cache.track(session)
        centre = centres.get(session)
        if centre is None:
            near = min(centres, key=lambda s: (abs(names.index(s) - index), names.index(s)))
            centre = centres[near]
        crop = axial_crop(scan.canonical, scan.affine, centre, half, fill=-1) if scan \
            else None
        if scan is None or crop is None:
            panels.append(SlicePanel(title, None, None, (0.0, 1.0, 0.0, 1.0)))
            backgrounds.setdefault("no track image or outside the scan", []).append(session)
            continue
        image, note = cache.image(session)
        image_crop = axial_crop(image, scan.affine, centre, half, fill=np.nan) \
            if image is not None else None
        panels.append(SlicePanel(title, crop[0], image_crop[0] if image_crop else None, crop[1],
                                 cache.window(session) if image_crop else None))
        backgrounds.setdefault("over the MRI image" if image_crop else f"over the track "
                               f"image alone ({note or 'image outside the slice'})",
                               []).append(session)
    figure = lesion_slices_figure(panels, lesion, per_row=settings.panels_per_row,
                                  dpi=settings.figure_dpi)
    where = "; ".join(f"{k}: session(s) {', '.join(v)}" for k, v in backgrounds.items())
    return figure, ("Axial slices through the lesion's centroid (R on the right, anterior up; "
                    "where the lesion is absent, through its last known place). Solid orange: "
                    "this lesion; dashed blue: other lesions; white: outside the scan. "
                    f"Background {where}.")
