"""HTML of the QA report: one self-contained page, every value escaped, no external reference.

The page is built from view objects (:class:`PageView`, :class:`SubjectView`,
:class:`LesionView`, :class:`Flag`) that :mod:`pipeline.report` fills from OUT. Styles and the
QA script come from ``pipeline/assets`` and are inlined.
"""
from __future__ import annotations

import html
import math
from collections.abc import Iterable, Sequence
from dataclasses import dataclass, field
from importlib import resources

import numpy as np
import pandas as pd

#: Columns of corrections.tsv as the report's QA script writes them.
CORRECTIONS_COLUMNS = ("subject", "session", "component", "lesion", "note")


@dataclass(frozen=True)
class Flag:
    """One item a reviewer should look at, with the id of its place in the page."""

    kind: str
    subject: str
    text: str
    anchor: str


@dataclass(frozen=True)
class LesionView:
    """One lesion track: its sessions, components, fits and slice figure."""

    subject: str
    lesion: int
    anchor: str
    summary: str
    sessions: pd.DataFrame      # session day status volume_mm3 components
    components: pd.DataFrame    # session component volume_mm3 measurable touches_border
    fits: pd.DataFrame          # phase model n_points beta beta_ci_low beta_ci_high note
    figure: str | None
    caption: str
    flags: tuple[str, ...] = ()


@dataclass(frozen=True)
class SubjectView:
    """One subject's section."""

    subject: str
    anchor: str
    timeline: str | None
    links: pd.DataFrame         # matches rows + lesion_from lesion_to flagged why anchor
    lesions: tuple[LesionView, ...]
    unassigned: pd.DataFrame    # components whose lesion is not known
    lesion_ids: tuple[int, ...]
    notes: tuple[str, ...] = ()


@dataclass(frozen=True)
class PageView:
    """Everything on the page."""

    disclaimer: str
    version: str
    problems: dict[str, str]
    summary: Sequence[tuple[str, str]]
    groups: pd.DataFrame
    beta_figure: str | None
    flags: Sequence[Flag]
    errors: pd.DataFrame
    evaluation: pd.DataFrame | None
    subjects: Sequence[SubjectView]
    run_details: Sequence[tuple[str, str]] = field(default_factory=tuple)


def esc(value: object) -> str:
    """Escape any value for HTML text or a quoted attribute; missing values become ``n/a``."""
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return "n/a"
    return html.escape(str(value), quote=True)


def slug(*parts: object) -> str:
    """An id made of ``parts``: letters and digits kept, anything else hex-escaped (one-to-one).

    Examples
    --------
    >>> slug("lesion", "P 01", 3)
    'lesion-P_2001-3'
    """
    def one(part: object) -> str:
        return "".join(c if c.isascii() and c.isalnum() else f"_{ord(c):02x}" for c in str(part))
    return "-".join(one(p) for p in parts)


def number(value: object, digits: int = 2) -> str:
    """A number for reading: ``n/a`` when missing, whole numbers without decimals.

    Examples
    --------
    >>> number(30.0), number(0.1428), number(float("nan"))
    ('30', '0.14', 'n/a')
    """
    x = _float(value)
    if x is None:
        return esc(value) if value not in (None, "") else "n/a"
    if not math.isfinite(x):
        return "n/a"
    if x == int(x) and abs(x) < 1e15:
        return str(int(x))
    return f"{x:.{digits}f}"


def _float(value: object) -> float | None:
    try:
        return float(value)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        return None


def beta_text(beta: object, low: object, high: object) -> str:
    """``0.74 (0.52–0.96)``, or ``0.88 (no interval)``, or ``n/a``.

    Examples
    --------
    >>> beta_text(0.74, 0.52, 1)
    '0.74 (0.52–1.00)'
    """
    values = [_float(v) for v in (beta, low, high)]
    shown = [f"{v:.2f}" if v is not None and math.isfinite(v) else None for v in values]
    if shown[0] is None:
        return "n/a"
    if shown[1] is None or shown[2] is None:
        return f"{shown[0]} (no interval)"
    return f"{shown[0]} ({shown[1]}–{shown[2]})"


def table(frame: pd.DataFrame, columns: Sequence[tuple[str, str]], *, cls: str = "",
          row_attrs=None, extra=None) -> str:
    """An HTML table of ``frame`` with (column, heading) pairs; optional per-row extras."""
    head = "".join(f"<th>{esc(h)}</th>" for _, h in columns)
    if extra is not None:
        head += "<th>review</th>"
    body = []
    for _, row in frame.iterrows():
        attrs = row_attrs(row) if row_attrs else ""
        cells = "".join(f"<td>{_cell(row.get(c))}</td>" for c, _ in columns)
        if extra is not None:
            cells += f"<td class='qa'>{extra(row)}</td>"
        body.append(f"<tr{attrs}>{cells}</tr>")
    return (f"<table class='{esc(cls)}'><thead><tr>{head}</tr></thead>"
            f"<tbody>{''.join(body)}</tbody></table>")


def _cell(value: object) -> str:
    if isinstance(value, str):
        return esc(value) if value else ""
    if isinstance(value, (bool, np.bool_)):
        return "yes" if value else "no"
    if isinstance(value, float):
        return number(value, 0 if abs(value) >= 100 else 2)
    return esc(value)


def _asset(name: str) -> str:
    return (resources.files("pipeline.report") / "assets" / name).read_text(encoding="utf-8")


def qa_controls(subject: str, session: str, component: int, lesion_ids: Iterable[int], *,
                wrong: bool) -> str:
    """Controls that put one component into corrections.tsv (read by assets/report.js)."""
    data = (f"data-subject='{esc(subject)}' data-session='{esc(session)}' "
            f"data-component='{esc(component)}'")
    what = f"{esc(subject)} session {esc(session)} component {esc(component)}"
    parts = []
    if wrong:
        parts.append(f"<label class='qa-wrong-label'><input type='checkbox' class='qa-wrong' "
                     f"{data} aria-label='link to {what} is wrong'> wrong</label>")
    options = "".join(f"<option value='{int(i)}'>lesion {int(i)}</option>" for i in lesion_ids)
    parts.append(f"<select class='qa-move' {data} aria-label='move {what}'>"
                 f"<option value=''>keep</option><option value='new'>new lesion</option>"
                 f"{options}</select>")
    parts.append(f"<input type='text' class='qa-note' {data} placeholder='note' "
                 f"aria-label='note for {what}'>")
    return " ".join(parts)


def render_page(view: PageView) -> str:
    """The whole page as one string."""
    nav = "".join(f"<li><a href='#{esc(s.anchor)}'>{esc(s.subject)}</a></li>"
                  for s in view.subjects)
    body = "\n".join([
        _banner(view.disclaimer),
        "<nav class='toc'><h2>Contents</h2><ul><li><a href='#summary'>Cohort summary</a></li>"
        "<li><a href='#flagged'>Flagged items</a></li><li><a href='#qa'>Review and save "
        f"corrections</a></li><li><a href='#evaluation'>Evaluation</a></li>{nav}</ul></nav>",
        _problems(view.problems), _flags(view.flags), _summary(view), _qa_section(),
        _evaluation(view.evaluation, view.problems),
        "\n".join(_subject(s) for s in view.subjects), _footer(view),
    ])
    return ("<!DOCTYPE html>\n<html lang='en'><head><meta charset='utf-8'>"
            "<meta name='viewport' content='width=device-width, initial-scale=1'>"
            "<link rel='icon' href='data:,'>"
            "<title>Lesion growth QA report</title>"
            f"<style>{_asset('report.css')}</style></head><body><main>\n{body}\n</main>"
            f"{_save_bar()}<script>{_asset('report.js')}</script></body></html>\n")


def _banner(disclaimer: str) -> str:
    return (f"<header><div class='caution' id='caution' role='note'><strong>Caution.</strong> "
            f"{esc(disclaimer)}</div><h1>Lesion growth QA report</h1></header>")


def _problems(problems: dict[str, str]) -> str:
    if not problems:
        return ("<section id='inputs'><p class='ok'>Every input the report reads was found."
                "</p></section>")
    items = "".join(f"<li class='missing'>{esc(m)}</li>" for m in problems.values())
    return (f"<section id='inputs'><h2>Inputs not available or out of date</h2><ul>{items}</ul>"
            "<p>The rest of the page shows what could be read.</p></section>")


def _flags(flags: Sequence[Flag]) -> str:
    if not flags:
        return ("<section id='flagged'><h2>Flagged items</h2><p>Nothing was flagged.</p>"
                "</section>")
    groups: dict[str, list[Flag]] = {}
    for flag in flags:
        groups.setdefault(flag.kind, []).append(flag)
    parts = []
    for kind, items in groups.items():
        rows = "".join(f"<li class='flag'><a href='#{esc(f.anchor)}'>{esc(f.subject)}</a>: "
                       f"{esc(f.text)}</li>" for f in items)
        state = " open" if len(items) <= 12 else ""  # long lists start folded
        parts.append(f"<details class='flags'{state}><summary>{esc(kind)} ({len(items)})"
                     f"</summary><ul>{rows}</ul></details>")
    return (f"<section id='flagged'><h2>Flagged items ({len(flags)})</h2>"
            "<p>Each item links to its place below.</p>" + "".join(parts) + "</section>")


def _summary(view: PageView) -> str:
    facts = "".join(f"<tr><th>{esc(k)}</th><td>{esc(v)}</td></tr>" for k, v in view.summary)
    if view.groups.empty:
        groups = "<p class='missing'>No group fits to show.</p>"
    else:
        groups = view.groups.assign(
            beta_text=[beta_text(r.get("beta"), r.get("beta_ci_low"), r.get("beta_ci_high"))
                       for _, r in view.groups.iterrows()],
            group=[g or "all" for g in view.groups.get("group", pd.Series("", view.groups.index))])
        groups = table(groups, [("group", "group"), ("phase", "phase"), ("model", "model"),
                                ("n_lesions", "lesions"), ("n_points", "sessions"),
                                ("beta_text", "beta (95% interval)")], cls="groups")
    figure = (f"<figure><img alt='Distribution of per-lesion beta' src='{view.beta_figure}'>"
              "<figcaption>Per-lesion beta (bars) and group beta with interval (lines and "
              "shading).</figcaption></figure>" if view.beta_figure else "")
    return ("<section id='summary'><h2>Cohort summary</h2>"
            f"<table class='facts'>{facts}</table><h3>Growth exponent beta by group and phase"
            f"</h3>{groups}{figure}<p class='note'>A per-lesion beta comes from few sessions "
            "(often three to five). It is fragile: one mis-measured volume can move it a lot, "
            "and with as many sessions as parameters it has no interval at all. The group "
            "figure pools many lesions and is steadier.</p>"
            f"{_errors(view.errors, view.problems)}</section>")


def _errors(errors: pd.DataFrame, problems: dict[str, str]) -> str:
    if "errors.tsv" in problems:
        body = f"<p class='missing'>{esc(problems['errors.tsv'])}</p>"
    elif errors.empty:
        body = "<p>No input failed.</p>"
    else:
        body = table(errors, [(c, c) for c in ("subject", "session", "path", "stage", "reason")
                              if c in errors], cls="errors")
    return f"<div id='failures'><h3>Failed inputs</h3>{body}</div>"


def _qa_section() -> str:
    header = "\t".join(CORRECTIONS_COLUMNS)
    return ("<section id='qa'><h2>Review and save corrections</h2><p>Beside each link and "
            "component: tick <em>wrong</em> to detach the later component into a lesion of its "
            "own, or choose another lesion to move the component there. Then press <em>Save "
            "corrections.tsv</em> and rerun matching with <code>lesion-growth match OUT "
            "--corrections corrections.tsv</code>. Nothing is sent anywhere; marks are lost when "
            "the page is closed unless saved.</p><h3>Rows to be saved "
            "(<span id='corrections-count'>0</span>)</h3>"
            f"<pre id='corrections-preview'>{esc(header)}\n</pre></section>")


def _save_bar() -> str:
    return ("<div class='savebar' role='region' aria-label='corrections'>"
            "<span><span id='corrections-count-bar'>0</span> correction rows</span> "
            "<button type='button' id='save-corrections'>Save corrections.tsv</button> "
            "<button type='button' id='clear-corrections'>Clear</button>"
            "<a href='#qa'>preview</a></div>")


def _evaluation(evaluation: pd.DataFrame | None, problems: dict[str, str]) -> str:
    if evaluation is None or "evaluation.tsv" in problems:
        body = ("<p>No evaluation.tsv in OUT (run <code>lesion-growth evaluate OUT --outcomes "
                "OUTCOMES.tsv</code> to make one).</p>")
    elif evaluation.empty:
        body = "<p>evaluation.tsv has no rows.</p>"
    else:
        body = table(evaluation, [(c, c) for c in evaluation.columns], cls="evaluation")
    return f"<section id='evaluation'><h2>Evaluation</h2>{body}</section>"


def _subject(view: SubjectView) -> str:
    notes = "".join(f"<p class='missing'>{esc(n)}</p>" for n in view.notes)
    timeline = (f"<figure><img alt='Lesion volumes of {esc(view.subject)} over time' "
                f"src='{view.timeline}'><figcaption>Lesion volumes (log scale) with fitted power "
                "laws per phase and events.</figcaption></figure>" if view.timeline
                else "<p class='missing'>No positive lesion volumes to draw.</p>")
    lesions = "\n".join(_lesion(view, lesion) for lesion in view.lesions)
    unassigned = ""
    if not view.unassigned.empty:
        unassigned = ("<h3>Components without a known lesion</h3>" + table(
            view.unassigned, [("session", "session"), ("component", "component"),
                              ("volume_mm3", "volume (mm³)")],
            extra=lambda r: qa_controls(view.subject, str(r["session"]), int(r["component"]),
                                        view.lesion_ids, wrong=False)))
    return (f"<section class='subject' id='{esc(view.anchor)}'><h2>Subject "
            f"{esc(view.subject)}</h2>{notes}{timeline}<h3>Links between sessions</h3>"
            f"{_links(view)}{unassigned}{lesions}</section>")


def _links(view: SubjectView) -> str:
    if view.links.empty:
        return "<p>No links (fewer than two sessions with lesions, or matches.tsv missing).</p>"
    columns = [("session_from", "from session"), ("component_from", "component"),
               ("lesion_from", "lesion"), ("session_to", "to session"),
               ("component_to", "component"), ("lesion_to", "lesion"), ("relation", "relation"),
               ("overlap", "overlap (Dice)"), ("centroid_distance_mm", "distance (mm)"),
               ("why", "flag")]

    def attrs(row) -> str:
        return f" id='{esc(row['anchor'])}'" + (" class='flagged'" if row["flagged"] else "")

    def extra(row) -> str:
        return qa_controls(view.subject, str(row["session_to"]), int(row["component_to"]),
                           view.lesion_ids, wrong=True)
    return table(view.links, columns, cls="links", row_attrs=attrs, extra=extra)


def _lesion(subject: SubjectView, view: LesionView) -> str:
    flags = "".join(f"<li>{esc(f)}</li>" for f in view.flags)
    flags = f"<ul class='lesion-flags'>{flags}</ul>" if flags else ""
    fits = "<p>No fits for this lesion.</p>"
    if not view.fits.empty:
        shown = view.fits.assign(beta_text=[
            beta_text(r.get("beta"), r.get("beta_ci_low"), r.get("beta_ci_high"))
            for _, r in view.fits.iterrows()])
        fits = table(shown, [(c, h) for c, h in (
            ("phase", "phase"), ("model", "model"), ("n_points", "sessions"),
            ("day_start", "first day"), ("day_end", "last day"), ("beta_text", "beta (interval)"),
            ("best", "best"), ("note", "note")) if c in shown or c == "beta_text"], cls="fits")
    components = "<p>No components known for this lesion.</p>"
    if not view.components.empty:
        components = table(view.components, [(c, h) for c, h in (
            ("session", "session"), ("component", "component"), ("volume_mm3", "volume (mm³)"),
            ("max_axial_diameter_mm", "max axial diameter (mm)"), ("measurable", "measurable"),
            ("touches_border", "touches border")) if c in view.components], cls="components",
            extra=lambda r: qa_controls(view.subject, str(r["session"]), int(r["component"]),
                                        subject.lesion_ids, wrong=False))
    sessions = table(view.sessions, [(c, h) for c, h in (
        ("session", "session"), ("day", "day"), ("status", "status"),
        ("volume_mm3", "volume (mm³)"), ("components", "components"),
        ("merged_into", "merged into"), ("merged_from", "absorbed")) if c in view.sessions],
        cls="sessions")
    figure = (f"<figure><img alt='Slices of lesion {view.lesion}' src='{view.figure}'>"
              f"<figcaption>{esc(view.caption)}</figcaption></figure>" if view.figure
              else f"<p class='missing'>{esc(view.caption)}</p>")
    cls = "lesion flagged" if view.flags else "lesion"
    return (f"<article class='{cls}' id='{esc(view.anchor)}'><h3>Lesion {view.lesion} of "
            f"{esc(view.subject)}</h3><p>{esc(view.summary)}</p>{flags}{figure}"
            f"<div class='cols'><div><h4>Sessions</h4>{sessions}</div><div><h4>Fits</h4>"
            f"{fits}</div></div><h4>Components</h4>{components}</article>")


def _footer(view: PageView) -> str:
    details = "".join(f"<tr><th>{esc(k)}</th><td>{esc(v)}</td></tr>" for k, v in view.run_details)
    return (f"<footer id='about'><h2>About this report</h2><table class='facts'>{details}</table>"
            f"<p>Made by lesion-growth {esc(view.version)}. Tables carry days from each "
            "subject's first session, never dates. This page may still carry identifiers in "
            f"file paths: handle it like the inputs.</p><p class='caution-small'>"
            f"{esc(view.disclaimer)}</p></footer>")
