"""The QA report: read what is in OUT and write a cohort index with one page per subject.

The report never recomputes a stage: volumes, links, tracks and fits are shown as the tables in
OUT hold them. It reads ``lesions.tsv``, ``masks.tsv``, ``matches.tsv``, ``longitudinal.tsv``,
``fits.tsv``, ``group_fits.tsv``, ``errors.tsv``, ``evaluation.tsv`` and ``events.tsv`` (both
optional), ``tracks/`` and ``provenance.json``; any of them may be missing and the page says so.

It writes ``report.html`` (the entry point: caution, flagged items, review queue, cohort views,
the list of subjects) and beside it the folder ``report/``: one page per subject (timeline,
links, lesions with their slice panels as embedded PNG), the shared style and script, and
``queue.js``, every flagged item of the cohort in review order. No page loads anything from
outside that folder; no server is needed.

The pages are also the QA tool: beside each link and component a reviewer can mark the link
wrong or move the component to another lesion; marks from every page are gathered into one
``corrections.tsv`` (columns subject session component lesion note) for
``lesion-growth match OUT --corrections``.
"""
from __future__ import annotations

from collections.abc import Sequence
from pathlib import Path

import pandas as pd

from pipeline.io.tsv import write_text
from pipeline.report import pages
from pipeline.report.data import ReportInputs, load_inputs
from pipeline.report.flags import FLAG_KINDS, failure_flags
from pipeline.report.sections import Cohort
from pipeline.report.views import PanelStore, subject_view, with_panels
from pipeline.settings import ReportSettings

#: Files the report writes into ``report/`` besides the subject pages.
SHARED_FILES = ("report.css", "report.js", "queue.js")


def write_report(out_dir: str | Path, *, settings: ReportSettings = ReportSettings(),
                 out_of_date: Sequence[str] = ()) -> Path:
    """Write ``OUT/report.html`` and ``OUT/report/`` from what is in ``out_dir``.

    Parameters
    ----------
    out_dir : str or Path
        The output folder of a run. Missing inputs are named on the page, never an error.
    settings : ReportSettings
        Panel cap (0: every lesion), low-overlap threshold, slice window (mm), panel size.
    out_of_date : sequence of str
        What the run layer found out of date in OUT (tables of different or unfinished runs);
        listed at the top of the page.

    Returns
    -------
    Path
        ``out_dir / "report.html"``; every file is written atomically, pages of subjects no
        longer in OUT are removed.

    Examples
    --------
    >>> import tempfile
    >>> path = write_report(tempfile.mkdtemp())
    >>> "fits.tsv is missing" in path.read_text(encoding="utf-8")
    True
    """
    out = Path(out_dir)
    folder = out / "report"
    inputs = load_inputs(out, out_of_date=out_of_date)
    views = [subject_view(inputs, s, settings) for s in subject_ids(inputs)]
    views.sort(key=lambda v: not v.flags)              # flagged subjects first
    draw = panel_choice(views, settings.max_lesion_panels)
    store = PanelStore(out / ".cache" / "report")
    env = pages.environment()
    written = set()
    for index, view in enumerate(views):
        full = with_panels(inputs, view, settings, store,
                           draw=None if draw is None else draw.get(view.subject, set()))
        text = pages.render_subject(env, full, settings=settings,
                                    previous=views[index - 1] if index else None,
                                    following=views[index + 1] if index + 1 < len(views)
                                    else None)
        write_text(folder / view.page, text)
        written.add(view.page)
    flags = failure_flags(inputs) + [f for v in views for f in v.flags]
    flags.sort(key=lambda f: FLAG_KINDS.index(f.kind))
    write_text(folder / "queue.js", pages.queue_script(flags))
    for name in ("report.css", "report.js"):
        write_text(folder / name, pages.asset(name))
    cohort = Cohort(inputs=inputs, settings=settings, subjects=tuple(views), flags=tuple(flags),
                    summary=tuple(cohort_summary(inputs)),
                    run_details=tuple(_run_details(inputs.provenance)))
    path = out / "report.html"
    write_text(path, pages.render_index(env, cohort))
    for stale in folder.glob("subject-*.html"):
        if stale.name not in written:
            stale.unlink(missing_ok=True)
    store.prune()
    return path


def panel_choice(views, cap: int) -> dict[str, set[int]] | None:
    """Lesions that get slice panels under a cap of ``cap`` (0: every lesion, None returned):
    flagged lesions first, in the order of ``views``, then the others.

    Examples
    --------
    >>> panel_choice([], 0) is None
    True
    """
    if cap <= 0:
        return None
    ranked = [(not lesion.flags, n, view.subject, lesion.lesion) for n, view in enumerate(views)
              for lesion in view.lesions]
    chosen: dict[str, set[int]] = {}
    for _, _, subject, lesion in sorted(ranked)[:cap]:
        chosen.setdefault(subject, set()).add(lesion)
    return chosen


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
