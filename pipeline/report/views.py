"""One subject's page as view objects: links, flags, lesions, timeline and slice panels.

Built in two steps so a cohort-wide panel cap can favour flagged lesions: :func:`subject_view`
gathers the tables and flags (no pixels), :func:`with_panels` then draws the chosen lesions'
slices. Panels are PNG files kept under ``OUT/.cache/report/`` by content key, so a rebuild
redraws only panels whose arrays changed.
"""
from __future__ import annotations

import dataclasses
import hashlib
import json
from dataclasses import dataclass, field
from pathlib import Path

import numpy as np
import pandas as pd

from pipeline.io.atomic import atomic_path
from pipeline.report import png, svg
from pipeline.io.names import track_path
from pipeline.report.data import (ReportInputs, ScanCache, component_lesions, find_image,
                                  lesion_centres, records)
from pipeline.report.figures import axial_crop
from pipeline.report.flags import lesion_anchor, subject_flags, subject_links
from pipeline.report.html import LesionView, Panel, SubjectView, beta_text, number, slug
from pipeline.settings import ReportSettings

CAPTION = ("Axial slices through the lesion's centroid (R on the right, anterior up; where the "
           "lesion is absent, through its last known place). Solid orange: this lesion; dashed "
           "blue: other lesions; white: outside the scan.")


@dataclass
class PanelStore:
    """PNG panels by content key in ``folder``; counts panels drawn and reused."""

    folder: Path
    drawn: int = 0
    reused: int = 0
    used: set = field(default_factory=set)

    def png(self, track: np.ndarray, image: np.ndarray | None,
            window: tuple[float, float] | None, lesion: int, scale: int) -> tuple[str, bytes]:
        """The panel's file name and PNG bytes: from the store when the same arrays were drawn
        before."""
        name = png.panel_key(track, image, window, lesion, scale) + ".png"
        data = self.read(name)
        if data is not None:
            self.reused += 1
            return name, data
        data = png.encode_png(png.panel_rgb(track, image, window, lesion, scale=scale))
        self.drawn += 1
        self.write(name, data)
        return name, data

    def read(self, name: str) -> bytes | None:
        """A stored file's bytes (None when absent or not a PNG); marks it used."""
        self.used.add(name)
        try:
            data = (self.folder / name).read_bytes()
        except OSError:
            return None
        return data if not name.endswith(".png") or data.startswith(png.PNG_SIGNATURE) \
            else None

    def write(self, name: str, data: bytes) -> None:
        """Store ``data`` as ``name`` (a read-only OUT still gets its report)."""
        self.used.add(name)
        try:
            with atomic_path(self.folder / name, durable=False) as tmp:
                tmp.write_bytes(data)
        except OSError:
            pass

    def prune(self) -> None:
        """Delete stored panels that this build did not use."""
        if self.folder.is_dir():
            for path in [*self.folder.glob("*.png"), *self.folder.glob("*.json")]:
                if path.name not in self.used:
                    path.unlink(missing_ok=True)


def subject_page(subject: str) -> str:
    """File name of a subject's page inside ``report/`` (one-to-one with the subject id).

    Examples
    --------
    >>> subject_page("P 01")
    'subject-P_2001.html'
    """
    return slug("subject", subject) + ".html"


def subject_group(inputs: ReportInputs, subject: str) -> str:
    """The subject's group as the tables name it (fits.tsv first), empty when none does."""
    for name in ("fits.tsv", "longitudinal.tsv", "masks.tsv"):
        rows = inputs.of_subject(name, subject)
        if "group" in rows:
            values = [str(v) for v in rows["group"] if str(v) not in ("", "nan", "None")]
            if values:
                return values[0]
    return ""


def subject_view(inputs: ReportInputs, subject: str, settings: ReportSettings) -> SubjectView:
    """Tables, flags and the timeline of one subject; lesions without panels yet.

    Examples
    --------
    >>> import tempfile
    >>> from pipeline.report.data import load_inputs
    >>> view = subject_view(load_inputs(tempfile.mkdtemp()), "P1", ReportSettings())
    >>> view.page, view.lesions, view.timeline is None
    ('subject-P1.html', (), True)
    """
    lesions = inputs.of_subject("lesions.tsv", subject)
    matches = inputs.of_subject("matches.tsv", subject)
    mapping = component_lesions(inputs.of_subject("lesion_components.tsv", subject), matches) \
        if len(lesions) else {}
    longitudinal = inputs.of_subject("longitudinal.tsv", subject)
    fits = inputs.of_subject("fits.tsv", subject)
    events = inputs.of_subject("events.tsv", subject)
    ids = sorted({int(v) for v in pd.to_numeric(longitudinal.get("lesion", pd.Series(
        dtype=float)), errors="coerce").dropna()} | set(mapping.values()))
    links = subject_links(matches, mapping, subject, settings)
    page, group = subject_page(subject), subject_group(inputs, subject)
    flags = tuple(dataclasses.replace(f, page=page, group=group) for f in subject_flags(
        links, longitudinal, fits, lesions, mapping, subject))
    owners = pd.Series([mapping.get((str(s), int(c))) for s, c in zip(
        lesions.get("session", ()), lesions.get("component", ()))], index=lesions.index,
        dtype=object)
    tracks, own_fits = _by_lesion(longitudinal), _by_lesion(fits)
    if len(longitudinal) and "day" in longitudinal:
        tracks = {k: v.sort_values("day") for k, v in tracks.items()}
    views = [_lesion_view(subject, lesion, lesions[owners == lesion],
                          tracks.get(lesion, longitudinal.iloc[0:0]),
                          own_fits.get(lesion, fits.iloc[0:0]), flags) for lesion in ids]
    views.sort(key=lambda v: not v.flags)          # flagged lesions first, then by id
    if len(links):
        links = links.sort_values("flagged", ascending=False, kind="stable")
    known = pd.Series([(str(r["session"]), int(r["component"])) in mapping
                       for r in records(lesions)], index=lesions.index, dtype=bool)
    notes = ()
    if len(lesions) and not mapping:
        notes = ("The lesion of each component is unknown (no track images and no lesion "
                 "column in lesions.tsv).",)
    return SubjectView(subject=subject, page=page, group=group,
                       timeline=svg.timeline(longitudinal, fits, events)
                       if len(longitudinal) else None,
                       links=links, lesions=tuple(views), unassigned=lesions[~known],
                       lesion_ids=tuple(ids), flags=flags, notes=notes,
                       estimates=estimates(fits, _optional_rows(inputs, "population_lesions.tsv",
                                                                  subject)))


def _optional_rows(inputs: ReportInputs, name: str, subject: str) -> pd.DataFrame:
    """A subject's rows of a table a setting may turn off (its absence is not a problem)."""
    inputs.table(name, optional=True)
    return inputs.of_subject(name, subject)


def estimates(fits: pd.DataFrame, population: pd.DataFrame) -> pd.DataFrame | None:
    """The power law's beta per lesion phase: the lesion's own fit (fits.tsv) beside its
    population estimate (population_lesions.tsv) with the share the population supplied.

    Examples
    --------
    >>> own = pd.DataFrame({"lesion": [1], "phase": ["untreated"], "model": ["power"],
    ...                     "beta": [1.4], "beta_ci_low": [None], "beta_ci_high": [None]})
    >>> pop = pd.DataFrame({"lesion": [1], "phase": ["untreated"], "model": ["power"],
    ...                     "n_points": [3], "beta": [1.5], "beta_ci_low": [1.2],
    ...                     "beta_ci_high": [1.8], "shrinkage": [0.6], "note": [""]})
    >>> estimates(own, pop)[["own", "population"]].values.tolist()
    [['1.40 (no interval)', '1.50 (1.20–1.80)']]
    """
    if population.empty or "model" not in population:
        return None
    pop = population[population["model"].astype(str) == "power"]
    if pop.empty:
        return None
    own = fits[fits["model"].astype(str) == "power"] if "model" in fits else fits.iloc[0:0]
    text = {(int(r["lesion"]), str(r["phase"])): beta_text(r.get("beta"), r.get("beta_ci_low"),
                                                           r.get("beta_ci_high"))
            for r in records(own)}
    rows = [{"lesion": int(r["lesion"]), "phase": r["phase"], "n_points": r.get("n_points"),
             "own": text.get((int(r["lesion"]), str(r["phase"])), "not fitted"),
             "population": beta_text(r.get("beta"), r.get("beta_ci_low"), r.get("beta_ci_high")),
             "shrinkage": r.get("shrinkage"), "note": r.get("note")} for r in records(pop)]
    return pd.DataFrame(rows)


def with_panels(inputs: ReportInputs, view: SubjectView, settings: ReportSettings,
                store: PanelStore, *, draw: set[int] | None = None) -> SubjectView:
    """``view`` with slice panels for its lesions (only those in ``draw`` when given).

    When nothing the panels depend on has changed since the last build (the subject's track
    files and MRI files by size and modification time, its lesion rows, the settings), the
    panels come from the store without reading an image; otherwise they are drawn again, and
    the store still skips encoding every panel whose pixels are unchanged.
    """
    key = _subject_key(inputs, view, settings, draw)
    kept = store.read(f"{key}.json")
    if kept is not None:
        reused = _from_store(view, json.loads(kept), store)
        if reused is not None:
            return reused
    cache = ScanCache(inputs, view.subject)
    lesions = []
    for lesion in view.lesions:
        if draw is not None and lesion.lesion not in draw:
            caption = (f"Slices not drawn: the report shows at most {settings.max_lesion_panels}"
                       " lesions with slices (max_lesion_panels; flagged lesions first).")
            lesions.append(dataclasses.replace(lesion, caption=caption))
            continue
        panels, caption = _slices(cache, lesion, settings, store)
        lesions.append(dataclasses.replace(lesion, panels=panels, caption=caption))
    store.write(f"{key}.json", json.dumps({str(v.lesion): {
        "caption": v.caption, "panels": [dataclasses.asdict(p) | {"src": None}
                                         for p in v.panels]} for v in lesions}).encode())
    return dataclasses.replace(view, lesions=tuple(lesions))


def _subject_key(inputs: ReportInputs, view: SubjectView, settings: ReportSettings,
                 draw: set[int] | None) -> str:
    """Digest of what one subject's panels are drawn from."""
    digest = hashlib.sha256(f"{png.DRAWING_VERSION}{settings}{sorted(draw or [])}"
                            f"{draw is None}".encode())
    masks = inputs.of_subject("masks.tsv", view.subject)
    sessions = sorted({str(s) for v in view.lesions for s in v.sessions.get("session", ())})
    for session in sessions:
        track = track_path(inputs.out_dir, view.subject, session)
        stat = track.stat() if track.is_file() else None   # rewritten by match: a new mtime
        digest.update(f"{session}{stat and (stat.st_size, stat.st_mtime_ns)}".encode())
        given = masks.loc[masks["session"].astype(str) == session, "image"] \
            if "image" in masks and "session" in masks else ()
        for value in given:
            path = find_image(inputs, str(value)) if str(value) else None
            stat = path.stat() if path is not None else None
            digest.update(f"{path}{stat and (stat.st_size, stat.st_mtime_ns)}".encode())
    for lesion in view.lesions:
        digest.update(f"{lesion.lesion}".encode())
        for frame in (lesion.sessions, lesion.components):
            digest.update(repr((list(frame.columns), frame.to_numpy(dtype=object).tolist()))
                          .encode())
    return "subject-" + digest.hexdigest()[:32]


def _from_store(view: SubjectView, kept: dict, store: PanelStore) -> SubjectView | None:
    """``view`` with the panels of an earlier build, or None when one is missing."""
    lesions = []
    for lesion in view.lesions:
        entry = kept.get(str(lesion.lesion))
        if entry is None:
            return None
        panels = []
        for fields in entry["panels"]:
            panel = Panel(**fields)
            if panel.name:
                data = store.read(panel.name)
                if data is None:
                    return None
                panel = dataclasses.replace(panel, src=png.data_uri(data))
            panels.append(panel)
        lesions.append(dataclasses.replace(lesion, panels=tuple(panels),
                                           caption=entry["caption"]))
    store.reused += sum(len(v.panels) for v in lesions)
    return dataclasses.replace(view, lesions=tuple(lesions))


def _by_lesion(table: pd.DataFrame) -> dict[int, pd.DataFrame]:
    """Rows of ``table`` by whole-number lesion id (split once per subject)."""
    if table.empty or "lesion" not in table:
        return {}
    ids = pd.to_numeric(table["lesion"], errors="coerce")
    return {int(k): rows for k, rows in table.groupby(ids, sort=False) if float(k) == int(k)}


def _lesion_view(subject: str, lesion: int, components: pd.DataFrame, rows: pd.DataFrame,
                 own_fits: pd.DataFrame, flags) -> LesionView:
    """One lesion from its components, its longitudinal rows (by day) and its fits."""
    anchor = lesion_anchor(subject, lesion)
    if rows.empty and len(components):
        rows = components.groupby("session", as_index=False, sort=False).agg(
            day=("day", "first"), volume_mm3=("volume_mm3", "sum"),
            components=("component", "size")).assign(status="present").sort_values("day")
    return LesionView(subject=subject, lesion=lesion, anchor=anchor,
                      summary=_lesion_summary(_sessions(rows)), sessions=rows,
                      components=components, fits=own_fits, panels=(), caption="",
                      flags=tuple(f.text for f in flags if f.anchor == anchor))


def _sessions(rows: pd.DataFrame) -> list[tuple[str, object, str]]:
    return [(str(r["session"]), r.get("day"), str(r.get("status", "")))
            for r in records(rows)]


def _lesion_summary(sessions: list[tuple[str, object, str]]) -> str:
    if not sessions:
        return "No sessions recorded for this lesion."
    first, last = sessions[0], sessions[-1]
    return (f"Seen from session {first[0]} (day {number(first[1])}, {first[2] or 'present'}) "
            f"to session {last[0]} (day {number(last[1])}, {last[2] or 'present'}); "
            f"{len(sessions)} session(s).")


def _slices(cache: ScanCache, view: LesionView, settings: ReportSettings,
            store: PanelStore) -> tuple[tuple[Panel, ...], str]:
    sessions = _sessions(view.sessions)
    names = [s for s, _, _ in sessions]
    centres, radius = lesion_centres(cache, view.lesion, names, view.components)
    if not centres:
        return (), "No slices: this lesion is not found in any track image in tracks/."
    half = max(settings.slice_window_mm / 2.0, 2.0 * radius)
    target = int(round(1.9 * settings.figure_dpi))       # about 1.9 inches per panel
    panels, backgrounds = [], {}
    for index, (session, day, status) in enumerate(sessions):
        scan = cache.track(session)
        centre = centres.get(session)
        if centre is None:
            near = min(centres, key=lambda s: (abs(names.index(s) - index), names.index(s)))
            centre = centres[near]
        crop = axial_crop(scan.canonical, scan.affine, centre, half, fill=-1) if scan \
            else None
        title = dict(session=session, day=number(day), status=status)
        if scan is None or crop is None:
            panels.append(Panel(**title, src=None, reason="no slice"))
            backgrounds.setdefault("no track image or outside the scan", []).append(session)
            continue
        image, note = cache.image(session)
        image_crop = axial_crop(image, scan.affine, centre, half, fill=np.nan) \
            if image is not None else None
        scale = png.panel_scale(crop[0].shape, target_px=target)
        window = cache.window(session) if image_crop else None
        name, data = store.png(crop[0], image_crop[0] if image_crop else None, window,
                               view.lesion, scale)
        panels.append(Panel(**title, src=png.data_uri(data), width=crop[0].shape[0] * scale,
                            height=crop[0].shape[1] * scale, name=name))
        backgrounds.setdefault("over the MRI image" if image_crop else f"over the track "
                               f"image alone ({note or 'image outside the slice'})",
                               []).append(session)
    where = "; ".join(f"{k}: session(s) {', '.join(v)}" for k, v in backgrounds.items())
    return tuple(panels), f"{CAPTION} Background {where}."
