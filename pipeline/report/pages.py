"""Pages of the report rendered from the Jinja2 templates in ``pipeline/report/templates``.

Jinja2 escapes every value (``autoescape=True``); only markup built by the templates themselves
reaches the page unescaped. The queue of flagged items is written once, as ``report/queue.js``,
and read by every page (a classic script loads from a ``file://`` folder with no server).
"""
from __future__ import annotations

import json
from importlib import resources

from jinja2 import Environment, PackageLoader, StrictUndefined

from pipeline import DISCLAIMER, __version__
from pipeline.report.html import CORRECTIONS_COLUMNS, Flag, SubjectView
from pipeline.report.sections import (INDEX_FOOTER, INDEX_SECTIONS, SUBJECT_SECTIONS, Cohort,
                                      href)

TITLE = "Lesion growth QA report"


def environment() -> Environment:
    """The template environment: package templates, autoescaping, undefined names are errors.

    Examples
    --------
    >>> environment().from_string("{{ x }}").render(x="<b>")
    '&lt;b&gt;'
    """
    env = Environment(loader=PackageLoader("pipeline.report", "templates"), autoescape=True,
                      undefined=StrictUndefined, trim_blocks=True, lstrip_blocks=True,
                      keep_trailing_newline=True)
    env.globals.update(disclaimer=DISCLAIMER, version=__version__, title=TITLE,
                       corrections_header="\t".join(CORRECTIONS_COLUMNS))
    return env


def render_index(env: Environment, cohort: Cohort) -> str:
    """``report.html``: caution, flagged items, review queue, cohort views, subject list."""
    sections = [(s.name, s.template, s.data(cohort)) for s in INDEX_SECTIONS]
    footer = (INDEX_FOOTER.template, INDEX_FOOTER.data(cohort))
    return env.get_template("index.html.j2").render(
        sections=sections, footer=footer, root="report/", page_kind="index",
        subjects=cohort.subjects)


def render_subject(env: Environment, view: SubjectView, *,
                   previous: SubjectView | None, following: SubjectView | None,
                   settings) -> str:
    """One subject's page inside ``report/``."""
    sections = [(s.name, s.template, s.data(view)) for s in SUBJECT_SECTIONS]
    return env.get_template("subject.html.j2").render(
        sections=sections, view=view, root="", page_kind="subject",
        previous=previous, following=following, per_row=settings.panels_per_row)


def queue_script(flags: list[Flag] | tuple[Flag, ...]) -> str:
    """``report/queue.js``: the cohort's flagged items in review order, as one JSON value.

    Examples
    --------
    >>> text = queue_script([Flag("Merges", "P1", "x </script>", "lesion-P1-2", "s.html")])
    >>> "</script>" in text, '"h": "s.html#lesion-P1-2"' in text
    (False, True)
    """
    items = [{"k": f.kind, "s": f.subject, "g": f.group, "t": f.text, "h": href(f, root="")}
             for f in flags]
    payload = json.dumps({"items": items}, ensure_ascii=False)
    payload = payload.replace("<", "\\u003c").replace("\u2028", "\\u2028")
    return f"window.LESION_GROWTH_QUEUE = {payload};\n"


def asset(name: str) -> str:
    """Text of a file in ``pipeline/report/assets``."""
    return (resources.files("pipeline.report") / "assets" / name).read_text(encoding="utf-8")
