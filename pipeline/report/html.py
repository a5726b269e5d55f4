"""The report's view objects and the text helpers its templates use.

The builders in :mod:`pipeline.report.views` fill :class:`Flag`, :class:`Panel`,
:class:`LesionView` and :class:`SubjectView` from OUT; the Jinja2 templates under
``pipeline/report/templates/`` turn them into pages and escape every value.
"""
from __future__ import annotations

import math
from dataclasses import dataclass, field

import numpy as np
import pandas as pd

#: Columns of corrections.tsv as the report's QA script writes them.
CORRECTIONS_COLUMNS = ("subject", "session", "component", "lesion", "note")


@dataclass(frozen=True)
class Flag:
    """One item a reviewer should look at: its kind, subject, text and the id of its place.

    ``page`` is the file (inside ``report/``) holding the place, empty for the index page;
    ``group`` the subject's group, for the review queue's filter.
    """

    kind: str
    subject: str
    text: str
    anchor: str
    page: str = ""
    group: str = ""


@dataclass(frozen=True)
class Panel:
    """One session's slice panel: a PNG data URI (or None, with a reason) and its title."""

    session: str
    day: str
    status: str
    src: str | None
    width: int = 0
    height: int = 0
    reason: str = ""
    name: str = ""              # file name in the panel store (empty: no image)


@dataclass(frozen=True)
class LesionView:
    """One lesion track: its sessions, components, fits and slice panels."""

    subject: str
    lesion: int
    anchor: str
    summary: str
    sessions: pd.DataFrame      # session day status volume_mm3 components
    components: pd.DataFrame    # session component volume_mm3 measurable touches_border
    fits: pd.DataFrame          # phase model n_points beta beta_ci_low beta_ci_high note
    panels: tuple[Panel, ...]
    caption: str
    flags: tuple[str, ...] = ()


@dataclass(frozen=True)
class SubjectView:
    """One subject's page."""

    subject: str
    page: str                   # file name inside report/
    group: str
    timeline: dict | None       # geometry from pipeline.report.svg.timeline
    links: pd.DataFrame         # matches rows + lesion_from lesion_to flagged why anchor
    lesions: tuple[LesionView, ...]
    unassigned: pd.DataFrame    # components whose lesion is not known
    lesion_ids: tuple[int, ...]
    flags: tuple[Flag, ...] = ()
    notes: tuple[str, ...] = field(default_factory=tuple)
    estimates: pd.DataFrame | None = None   # per lesion phase: own fit vs population estimate


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
        return str(value) if value not in (None, "") else "n/a"
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


def cell(value: object) -> str:
    """A table cell's text (not yet escaped: the templates escape)."""
    if isinstance(value, str):
        return value
    if isinstance(value, (bool, np.bool_)):
        return "yes" if value else "no"
    if isinstance(value, float):
        return number(value, 0 if abs(value) >= 100 else 2)
    return "n/a" if value is None else str(value)
