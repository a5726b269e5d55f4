"""Plots of the report as inline SVG: geometry computed here, markup in the templates.

Inline SVG is offline, light, sharp when printed, and each point carries a ``<title>`` (shown on
hover by every browser, read by screen readers) and is focusable, showing its label on focus.

Colours are the Okabe-Ito palette (Okabe & Ito 2008, "Color Universal Design"), distinguishable
with the common colour-vision deficiencies; series also differ by marker shape and curves by
dash pattern, so colour never carries meaning alone.
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
import pandas as pd

from pipeline.report.data import records
from pipeline.report.figures import SERIES_COLOURS, drawable_power_fits, growth_rate, power_curve

MARKERS = ("circle", "square", "triangle", "diamond", "down", "plus", "cross")


def marker_path(shape: str, x: float, y: float, r: float = 4.0) -> str:
    """SVG path data of a marker of ``shape`` centred on (x, y).

    Examples
    --------
    >>> marker_path("square", 10, 10, 2)
    'M8.0 8.0h4.0v4.0h-4.0z'
    """
    if shape == "square":
        return f"M{x - r:.1f} {y - r:.1f}h{2 * r:.1f}v{2 * r:.1f}h{-2 * r:.1f}z"
    if shape in ("triangle", "down"):
        s = -1 if shape == "triangle" else 1
        return (f"M{x:.1f} {y + s * r * 1.2:.1f}L{x - r * 1.1:.1f} {y - s * r * 0.8:.1f}"
                f"L{x + r * 1.1:.1f} {y - s * r * 0.8:.1f}z")
    if shape == "diamond":
        return f"M{x:.1f} {y - r * 1.2:.1f}l{r:.1f} {r * 1.2:.1f}l{-r:.1f} {r * 1.2:.1f}" \
               f"l{-r:.1f} {-r * 1.2:.1f}z"
    if shape in ("plus", "cross"):
        a = r * 1.1 if shape == "plus" else r * 0.8
        if shape == "plus":
            return f"M{x - a:.1f} {y:.1f}h{2 * a:.1f}M{x:.1f} {y - a:.1f}v{2 * a:.1f}"
        return f"M{x - a:.1f} {y - a:.1f}l{2 * a:.1f} {2 * a:.1f}M{x - a:.1f} {y + a:.1f}" \
               f"l{2 * a:.1f} {-2 * a:.1f}"
    return f"M{x - r:.1f} {y:.1f}a{r:.1f} {r:.1f} 0 1 0 {2 * r:.1f} 0a{r:.1f} {r:.1f} 0 1 0 " \
           f"{-2 * r:.1f} 0z"


def _ticks_log(low: float, high: float) -> list[float]:
    """Tick values for a log axis: powers of ten, with 2 and 5 between when the span is short."""
    first, last = math.floor(math.log10(low)), math.ceil(math.log10(high))
    steps = (1, 2, 5) if last - first <= 3 else (1,)
    ticks = [m * 10.0 ** e for e in range(first, last + 1) for m in steps]
    return [t for t in ticks if low <= t <= high]


def _ticks_linear(low: float, high: float, count: int = 6) -> list[float]:
    span = max(high - low, 1e-9)
    raw = span / count
    step = 10 ** math.floor(math.log10(raw))
    step *= next(m for m in (1, 2, 2.5, 5, 10) if m * step >= raw)
    start = math.ceil(low / step) * step
    return [round(start + i * step, 10) for i in range(int((high - start) / step) + 1)]


def _label(value: float) -> str:
    return f"{value:g}" if abs(value) < 1e5 else f"{value:.0e}"


def timeline(series: pd.DataFrame, fits: pd.DataFrame, events: pd.DataFrame, *,
             width: int = 760, height: int = 280) -> dict | None:
    """Geometry of one subject's timeline: volumes (log scale) over days, fits and events.

    ``series``: longitudinal rows (lesion, session, day, volume_mm3, status). Returns None when
    there is no positive volume. Each point has a title naming lesion, session, day and volume.

    Examples
    --------
    >>> rows = pd.DataFrame({"lesion": [1, 1], "session": ["01", "02"], "day": [0.0, 30.0],
    ...                      "volume_mm3": [100.0, 250.0], "status": ["present"] * 2})
    >>> plot = timeline(rows, pd.DataFrame(), pd.DataFrame())
    >>> [p["title"] for p in plot["series"][0]["points"]]
    ['lesion 1 · session 01 · day 0 · 100 mm³', 'lesion 1 · session 02 · day 30 · 250 mm³']
    """
    volumes = pd.to_numeric(series.get("volume_mm3"), errors="coerce")
    days = pd.to_numeric(series.get("day"), errors="coerce")
    positive = volumes[(volumes > 0) & days.notna()]
    if positive.empty:
        return None
    event_days = pd.to_numeric(events.get("day"), errors="coerce").dropna() \
        if not events.empty and "day" in events else pd.Series(dtype=float)
    all_days = pd.concat([days.dropna(), event_days])
    pad = max((float(all_days.max()) - float(all_days.min())) * 0.04, 1.0)
    floor = float(positive.min()) / 3.0
    axes = _Axes(left=64, top=14, plot_w=width - 64 - 150, plot_h=height - 14 - 40,
                 x_low=float(all_days.min()) - pad, x_high=float(all_days.max()) + pad,
                 y_low=math.log10(floor / 1.3), y_high=math.log10(float(positive.max()) * 1.6))
    frame = series.assign(day=days, volume_mm3=volumes)
    frame = frame[frame["day"].notna()].sort_values("day", kind="stable")
    by_lesion: dict[object, list[dict]] = {}
    for row in records(frame):
        by_lesion.setdefault(row["lesion"], []).append(row)
    curves: dict[object, list[dict]] = {}
    drawable = drawable_power_fits(fits)
    for fit in records(drawable) if "lesion" in drawable else ():
        curves.setdefault(fit["lesion"], []).append(fit)
    return {"width": width, "height": height, "left": axes.left, "top": axes.top,
            "plot_w": axes.plot_w, "plot_h": axes.plot_h,
            "x_ticks": [(round(axes.px(t), 1), _label(t))
                        for t in _ticks_linear(axes.x_low, axes.x_high)],
            "y_ticks": [(round(axes.py(t), 1), _label(t))
                        for t in _ticks_log(10 ** axes.y_low, 10 ** axes.y_high)],
            "series": [_series(axes, lesion, by_lesion[lesion], index, curves.get(lesion, []),
                               floor=floor, width=width)
                       for index, lesion in enumerate(sorted(by_lesion, key=_order))],
            "events": _events(axes, events)}


@dataclass(frozen=True)
class _Axes:
    """Plot area (pixels) and its data ranges: days across, log10 volume up."""

    left: float
    top: float
    plot_w: float
    plot_h: float
    x_low: float
    x_high: float
    y_low: float
    y_high: float

    def px(self, day: float) -> float:
        return self.left + (day - self.x_low) / (self.x_high - self.x_low) * self.plot_w

    def py(self, volume: float) -> float:
        return self.top + (self.y_high - math.log10(volume)) / (self.y_high - self.y_low) \
            * self.plot_h


def _order(value: object) -> tuple:
    try:
        return (0, float(value), "")  # type: ignore[arg-type]
    except (TypeError, ValueError):
        return (1, 0.0, str(value))


def _series(axes: _Axes, lesion: object, rows: list[dict], index: int, fits: list[dict], *,
            floor: float, width: int) -> dict:
    """One lesion's points (titled), line, fitted curves and legend entry."""
    shape = MARKERS[index % len(MARKERS)]
    name = _lesion_text(lesion)
    points, line = [], []
    for row in rows:
        vol = float(row["volume_mm3"]) if math.isfinite(row["volume_mm3"]) else 0.0
        x, y = axes.px(float(row["day"])), axes.py(vol if vol > 0 else floor)
        status = str(row.get("status", "") or "")
        title = (f"lesion {name} · session {row.get('session', '')} · day "
                 f"{_label(float(row['day']))} · "
                 + (f"{vol:.0f} mm³" if vol > 0 else "absent")
                 + (f" · {status}" if status not in ("", "present", "nan") else ""))
        points.append({"d": marker_path(shape, x, y), "hollow": vol <= 0, "title": title,
                       "x": round(x, 1), "y": round(y, 1)})
        if vol > 0:
            line.append(f"{x:.1f},{y:.1f}")
    curves = [path for fit in fits for path in _curve_paths(
        fit, axes.px, axes.py, (10 ** axes.y_low, 10 ** axes.y_high))]
    legend_y = axes.top + 8 + 15 * index
    return {"name": name, "colour": SERIES_COLOURS[index % len(SERIES_COLOURS)], "shape": shape,
            "legend": marker_path(shape, width - 150 + 18, legend_y), "legend_y": legend_y + 4,
            "line": " ".join(line), "points": points, "curves": curves}


def _events(axes: _Axes, events: pd.DataFrame) -> list[dict]:
    """Dotted lines at events, labelled with the event (and its lesion)."""
    out = []
    for event in records(events) if not events.empty and "day" in events else ():
        day = pd.to_numeric(pd.Series([event.get("day")]), errors="coerce").iloc[0]
        if math.isfinite(day):
            label = str(event.get("event", "event"))
            lesion = pd.to_numeric(pd.Series([event.get("lesion")]), errors="coerce").iloc[0]
            if math.isfinite(lesion):
                label += f" (lesion {_lesion_text(lesion)})"
            out.append({"x": round(axes.px(float(day)), 1), "label": label,
                        "day": _label(float(day))})
    return out


def _curve_paths(fit: pd.Series, px, py, y_range: tuple[float, float]) -> list[str]:
    """Polylines of one fitted power law, split where it leaves the plot or has no value."""
    days = np.linspace(float(fit["day_start"]), float(fit["day_end"]), 48)
    curve = power_curve(days, v0_mm3=float(fit["v0_mm3"]), k_per_day=growth_rate(fit),
                        beta=float(fit["beta"]), day_start=float(fit["day_start"]))
    paths, current = [], []
    for day, volume in zip(days, curve):
        if math.isfinite(volume) and y_range[0] <= volume <= y_range[1]:
            current.append(f"{px(day):.1f},{py(volume):.1f}")
        elif current:
            paths.append(" ".join(current))
            current = []
    if current:
        paths.append(" ".join(current))
    return [p for p in paths if " " in p]


def _lesion_text(value: object) -> str:
    try:
        number = float(value)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        return str(value)
    return str(int(number)) if math.isfinite(number) and number == int(number) else str(value)


def beta_strips(fits: pd.DataFrame, groups: pd.DataFrame, *, width: int = 760) -> dict | None:
    """Geometry of the cohort view: per-lesion beta as dots, one strip per group and phase, with
    the group fit's beta and interval drawn over each strip.

    Examples
    --------
    >>> fits = pd.DataFrame({"subject": ["A", "B"], "lesion": [1, 1], "group": ["g", "g"],
    ...                      "phase": ["untreated"] * 2, "model": ["power"] * 2,
    ...                      "beta": [0.6, 0.9]})
    >>> plot = beta_strips(fits, pd.DataFrame())
    >>> [s["label"] for s in plot["strips"]], len(plot["strips"][0]["dots"])
    (['g · untreated (2 lesion phases)'], 2)
    """
    power = fits[fits["model"].astype(str) == "power"] if "model" in fits else fits.iloc[0:0]
    power = power.assign(beta=pd.to_numeric(power.get("beta"), errors="coerce"))
    power = power[power["beta"].notna()] if "beta" in power else power
    group_rows = groups.assign(beta=pd.to_numeric(groups["beta"], errors="coerce")) \
        if not groups.empty and "beta" in groups else pd.DataFrame()
    if power.empty and group_rows.empty:
        return None
    if not group_rows.empty and "model" in group_rows:
        group_rows = group_rows[group_rows["model"].astype(str) == "power"]
    keys: dict[tuple[str, str], None] = {}
    for frame in (power, group_rows):
        if not frame.empty:
            for row in records(frame):
                keys[(_text(row.get("group")) or "all", _text(row.get("phase")))] = None
    values = list(power["beta"]) + [v for c in ("beta", "beta_ci_low", "beta_ci_high")
                                    for v in pd.to_numeric(group_rows.get(c, pd.Series(
                                        dtype=float)), errors="coerce").dropna()]
    low, high = min(values + [0.0]), max(values + [1.5])
    low, high = max(low, -2.0) - 0.1, min(high, 4.0) + 0.1
    longest = max((len(f"{g} · {p} (0000 lesion phases)") for g, p in keys), default=20)
    left, right, row_h, top = int(min(380, 12 + 5.6 * longest)), 20, 30, 10  # 10 px text
    plot_w = width - left - right

    def px(beta: float) -> float:
        return left + (min(max(beta, low), high) - low) / (high - low) * plot_w

    strips = []
    for index, (group, phase) in enumerate(keys):
        y = top + row_h * index + row_h / 2
        mine = _same(power, group, phase)
        dots = []
        for n, row in enumerate(records(mine.sort_values("beta")) if len(mine) else ()):
            jitter = ((n * 7) % 9 - 4) * 2.2        # fixed spread, so the picture is reproducible
            dots.append({"x": round(px(float(row["beta"])), 1), "y": round(y + jitter, 1),
                         "title": f"{row.get('subject', '')} lesion "
                                  f"{_lesion_text(row.get('lesion'))} · {phase} · beta "
                                  f"{float(row['beta']):.2f}"})
        fit = _group_fit(group_rows, group, phase, px, y)
        strips.append({"label": f"{group} · {phase} ({len(mine)} lesion phases)", "y": y,
                       "dots": dots, "fit": fit})
    height = top + row_h * len(strips) + 36
    return {"width": width, "height": height, "left": left, "plot_w": plot_w, "top": top,
            "bottom": top + row_h * len(strips), "strips": strips, "one": round(px(1.0), 1),
            "ticks": [(round(px(t), 1), _label(t)) for t in _ticks_linear(low, high)]}


def _same(frame: pd.DataFrame, group: str, phase: str) -> pd.DataFrame:
    """Rows of ``frame`` of one group ('all' when none) and phase."""
    if frame.empty:
        return frame
    groups = frame.get("group", pd.Series([""] * len(frame), index=frame.index))
    phases = frame.get("phase", pd.Series([""] * len(frame), index=frame.index))
    return frame[[(_text(g) or "all", _text(p)) == (group, phase)
                  for g, p in zip(groups, phases)]]


def _group_fit(group_rows: pd.DataFrame, group: str, phase: str, px, y: float) -> dict | None:
    """The group fit's marker (diamond) and interval line on one strip, or None."""
    same = _same(group_rows, group, phase)
    if same.empty or not math.isfinite(float(same["beta"].iloc[0])):
        return None
    row = same.iloc[0]
    beta = float(row["beta"])
    lo, hi = (pd.to_numeric(pd.Series([row.get(c)]), errors="coerce").iloc[0]
              for c in ("beta_ci_low", "beta_ci_high"))
    both = math.isfinite(lo) and math.isfinite(hi)
    return {"x": round(px(beta), 1), "d": marker_path("diamond", px(beta), y, 6),
            "lo": round(px(lo), 1) if both else None, "hi": round(px(hi), 1) if both else None,
            "title": f"group {group} · {phase} · beta {beta:.2f}"
                     + (f" ({lo:.2f}–{hi:.2f})" if both else " (no interval)")}


def _text(value: object) -> str:
    if value is None or (isinstance(value, float) and math.isnan(value)):
        return ""
    return str(value)
