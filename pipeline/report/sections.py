"""The sections of the report's pages: each is one template plus one data function.

A section is a :class:`Section`: its template under ``templates/sections/`` and a function that
returns the template's variables. The index page (``report.html``) shows
:data:`INDEX_SECTIONS` in order from a :class:`Cohort`; every subject page shows
:data:`SUBJECT_SECTIONS` from its :class:`~pipeline.report.html.SubjectView`. A new table in
OUT becomes a new section by adding one template and one data function to these tuples: the
data function reads the table with ``cohort.inputs.table(name)`` (or ``of_subject``), which
reads it on first use and lists it under "Inputs not available" when it is missing.
"""
from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import pandas as pd

from pipeline.report import svg
from pipeline.report.data import ReportInputs, records
from pipeline.report.flags import FLAG_KINDS
from pipeline.report.html import Flag, SubjectView, beta_text, cell
from pipeline.settings import ReportSettings


@dataclass(frozen=True)
class Cohort:
    """What the index page is made from."""

    inputs: ReportInputs
    settings: ReportSettings
    subjects: tuple[SubjectView, ...]     # flagged subjects first
    flags: tuple[Flag, ...]               # in the order of FLAG_KINDS
    summary: tuple[tuple[str, str], ...]
    run_details: tuple[tuple[str, str], ...]


@dataclass(frozen=True)
class Section:
    """One section of a page: its template and the function that fills it."""

    name: str
    template: str
    data: Callable[..., dict]


def rows(frame: pd.DataFrame, columns: list[tuple[str, str]]) -> dict:
    """``{"head": [...], "rows": [[...], ...]}`` of ``frame``'s (column, heading) pairs.

    Examples
    --------
    >>> rows(pd.DataFrame({"a": [1.5], "b": ["x"]}), [("a", "A"), ("b", "B")])
    {'head': ['A', 'B'], 'rows': [['1.50', 'x']]}
    """
    kept = [(c, h) for c, h in columns if c in frame]
    return {"head": [h for _, h in kept],
            "rows": [[cell(v) for v in row] for row in
                     frame[[c for c, _ in kept]].to_numpy(dtype=object).tolist()]}


def href(flag: Flag, *, root: str) -> str:
    """Where a flag's place is, seen from a page whose path to ``report/`` is ``root``."""
    if not flag.page:
        return ("../report.html" if root == "" else "report.html") + f"#{flag.anchor}"
    return f"{root}{flag.page}#{flag.anchor}"


def _inputs(cohort: Cohort) -> dict:
    # the dict itself: tables a later section reads on first use are listed too
    return {"problems": cohort.inputs.problems}


def _flagged(cohort: Cohort) -> dict:
    kinds: dict[str, list[dict]] = {}
    for flag in cohort.flags:
        kinds.setdefault(flag.kind, []).append({"subject": flag.subject, "text": flag.text,
                                                "href": href(flag, root="report/")})
    return {"kinds": [(k, kinds[k]) for k in FLAG_KINDS if k in kinds],
            "total": len(cohort.flags)}


def _review(cohort: Cohort) -> dict:
    groups = sorted({f.group for f in cohort.flags if f.group})
    return {"kinds": [k for k in FLAG_KINDS if any(f.kind == k for f in cohort.flags)],
            "groups": groups}


def _summary(cohort: Cohort) -> dict:
    inputs = cohort.inputs
    groups = inputs.table("group_fits.tsv")
    table = None
    if not groups.empty:
        shown = groups.assign(
            beta_text=[beta_text(r.get("beta"), r.get("beta_ci_low"), r.get("beta_ci_high"))
                       for r in records(groups)],
            group=[g or "all" for g in groups.get("group", pd.Series("", groups.index))])
        table = rows(shown, [("group", "group"), ("phase", "phase"), ("model", "model"),
                             ("n_lesions", "lesions"), ("n_points", "sessions"),
                             ("beta_text", "beta (95% interval)")])
    errors = inputs.table("errors.tsv")
    return {"facts": cohort.summary, "groups": table,
            "strips": svg.beta_strips(inputs.table("fits.tsv"), groups),
            "errors_missing": inputs.problems.get("errors.tsv"),
            "errors": rows(errors, [(c, c) for c in ("subject", "session", "path", "stage",
                                                     "reason")]) if len(errors) else None}


def _evaluation(cohort: Cohort) -> dict:
    problems = cohort.inputs.problems
    table = cohort.inputs.table("evaluation.tsv")
    return {"missing": "evaluation.tsv" in problems, "empty": table.empty,
            "table": rows(table, [(c, c) for c in table.columns]) if len(table) else None}


def _population(cohort: Cohort) -> dict:
    """population_fits.tsv per group and phase (the power law first), with each row's note."""
    table = cohort.inputs.table("population_fits.tsv", optional=True)   # [population] enabled
    if table.empty:
        return {"missing": not (cohort.inputs.out_dir / "population_fits.tsv").exists(),
                "table": None}
    shown = table.assign(
        beta_text=[beta_text(r.get("beta_mean"), r.get("beta_mean_ci_low"),
                             r.get("beta_mean_ci_high")) for r in records(table)],
        group=[g or "all" for g in table.get("group", pd.Series("", table.index))])
    return {"missing": False, "table": rows(shown, [
        ("group", "group"), ("phase", "phase"), ("model", "law"), ("n_lesions", "lesions"),
        ("n_subjects", "subjects"), ("beta_text", "mean beta (95% interval)"),
        ("beta_sd", "between-lesion SD of beta"), ("sigma_log", "residual SD (ln volume)"),
        ("aic", "AIC"), ("best", "cohort's best law"), ("note", "note")])}


def _response(cohort: Cohort) -> dict:
    """response_subjects.tsv: each subject's best target-lesion response."""
    table = cohort.inputs.table("response_subjects.tsv", optional=True)   # [response] write
    if table.empty:
        return {"missing": not (cohort.inputs.out_dir / "response_subjects.tsv").exists(),
                "table": None}
    return {"missing": False, "table": rows(table, [
        ("subject", "subject"), ("baseline_session", "baseline session"),
        ("n_target", "target lesions"), ("best_response", "best response"),
        ("best_change_baseline_pct", "best change of the sum (%)"),
        ("first_progression_day", "first progression (day)"),
        ("response_duration_days", "response lasted (days)"),
        ("best_volume_category", "volume analogue (research)")])}


def _subjects(cohort: Cohort) -> dict:
    return {"subjects": [{"subject": s.subject, "href": f"report/{s.page}", "group": s.group,
                          "lesions": len(s.lesions), "flags": len(s.flags),
                          "kinds": ", ".join(dict.fromkeys(f.kind for f in s.flags))}
                         for s in cohort.subjects]}


def _about(cohort: Cohort) -> dict:
    return {"details": cohort.run_details}


#: Sections of the index page, in order (the caution banner and review bar come first).
INDEX_SECTIONS = (
    Section("inputs", "sections/inputs.html.j2", _inputs),
    Section("flagged", "sections/flagged.html.j2", _flagged),
    Section("review", "sections/review.html.j2", _review),
    Section("summary", "sections/summary.html.j2", _summary),
    Section("population", "sections/population.html.j2", _population),
    Section("response", "sections/response.html.j2", _response),
    Section("evaluation", "sections/evaluation.html.j2", _evaluation),
    Section("subjects", "sections/subjects.html.j2", _subjects),
)
#: The index page's footer.
INDEX_FOOTER = Section("about", "sections/about.html.j2", _about)


def _subject_flags(view: SubjectView) -> dict:
    return {"flags": [{"kind": f.kind, "text": f.text, "href": href(f, root="")}
                      for f in view.flags]}


def _timeline(view: SubjectView) -> dict:
    return {"plot": view.timeline, "subject": view.subject}


def _links(view: SubjectView) -> dict:
    if view.links.empty:
        return {"links": None}
    columns = [("session_from", "from session"), ("component_from", "component"),
               ("lesion_from", "lesion"), ("session_to", "to session"),
               ("component_to", "component"), ("lesion_to", "lesion"), ("relation", "relation"),
               ("overlap", "overlap (Dice)"), ("centroid_distance_mm", "distance (mm)"),
               ("why", "flag")]
    table = rows(view.links, columns)
    table["meta"] = [{"id": r["anchor"], "flagged": bool(r["flagged"]),
                      "qa": (str(r["session_to"]), int(r["component_to"]))}
                     for r in records(view.links)]
    return {"links": table}


def _unassigned(view: SubjectView) -> dict:
    if view.unassigned.empty:
        return {"table": None}
    table = rows(view.unassigned, [("session", "session"), ("component", "component"),
                                   ("volume_mm3", "volume (mm³)")])
    table["meta"] = [{"qa": (str(r["session"]), int(r["component"]))}
                     for r in records(view.unassigned)]
    return {"table": table}


def _lesions(view: SubjectView) -> dict:
    return {"lesions": [_lesion(view, lesion) for lesion in view.lesions]}


def _lesion(view: SubjectView, lesion) -> dict:
    fits = None
    if not lesion.fits.empty:
        shown = lesion.fits.assign(beta_text=[
            beta_text(r.get("beta"), r.get("beta_ci_low"), r.get("beta_ci_high"))
            for r in records(lesion.fits)])
        fits = rows(shown, [("phase", "phase"), ("model", "model"), ("n_points", "sessions"),
                            ("day_start", "first day"), ("day_end", "last day"),
                            ("beta_text", "beta (interval)"), ("best", "best"),
                            ("note", "note")])
    components = None
    if not lesion.components.empty:
        components = rows(lesion.components, [
            ("session", "session"), ("component", "component"), ("volume_mm3", "volume (mm³)"),
            ("max_axial_diameter_mm", "max axial diameter (mm)"), ("measurable", "measurable"),
            ("touches_border", "touches border")])
        components["meta"] = [{"qa": (str(r["session"]), int(r["component"]))}
                              for r in records(lesion.components)]
    sessions = rows(lesion.sessions, [
        ("session", "session"), ("day", "day"), ("status", "status"),
        ("volume_mm3", "volume (mm³)"), ("components", "components"),
        ("merged_into", "merged into"), ("merged_from", "absorbed")])
    return {"view": lesion, "fits": fits, "components": components, "sessions": sessions}


def _estimates(view: SubjectView) -> dict:
    if view.estimates is None or view.estimates.empty:
        return {"table": None}
    return {"table": rows(view.estimates, [
        ("lesion", "lesion"), ("phase", "phase"), ("n_points", "sessions"),
        ("own", "beta, own fit (95% interval)"), ("population", "beta, population estimate"),
        ("shrinkage", "share from the population"), ("note", "note")])}


#: Sections of a subject page, in order.
SUBJECT_SECTIONS = (
    Section("subject-flags", "sections/subject_flags.html.j2", _subject_flags),
    Section("timeline", "sections/timeline.html.j2", _timeline),
    Section("estimates", "sections/estimates.html.j2", _estimates),
    Section("links", "sections/links.html.j2", _links),
    Section("unassigned", "sections/unassigned.html.j2", _unassigned),
    Section("lesions", "sections/lesions.html.j2", _lesions),
)
