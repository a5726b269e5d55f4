"""Figures of the QA report, drawn with matplotlib's Agg renderer and returned as PNG data URIs.

Everything here takes arrays and tables already in memory; nothing reads files.

Colours: the Okabe-Ito palette (Okabe & Ito 2008, "Color Universal Design"), chosen because its
eight colours stay distinguishable for the common forms of colour-vision deficiency. Lesions are
also told apart by marker shape, and outlines by line style, so colour never carries meaning alone.
"""
from __future__ import annotations

import base64
import io
import math
from collections.abc import Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd
from matplotlib.figure import Figure

# Okabe-Ito palette (hex), named as in Okabe & Ito (2008).
BLACK, ORANGE, SKY_BLUE, BLUISH_GREEN = "#000000", "#E69F00", "#56B4E9", "#009E73"
YELLOW, BLUE, VERMILLION, REDDISH_PURPLE = "#F0E442", "#0072B2", "#D55E00", "#CC79A7"
#: Lesion colours in order of use (yellow left out: too pale on white).
SERIES_COLOURS = (BLUE, VERMILLION, BLUISH_GREEN, REDDISH_PURPLE, ORANGE, SKY_BLUE, BLACK)
SERIES_MARKERS = ("o", "s", "^", "D", "v", "P", "X", "<", ">")
EVENT_COLOUR = "#555555"

PNG_SIGNATURE = b"\x89PNG\r\n\x1a\n"


def png_data_uri(fig: Figure) -> str:
    """Render ``fig`` as PNG and return it as a ``data:image/png;base64,...`` URI.

    Examples
    --------
    >>> fig = Figure(figsize=(1, 1), dpi=20)
    >>> _ = fig.add_subplot().plot([0, 1], [0, 1])
    >>> png_data_uri(fig)[:22]
    'data:image/png;base64,'
    """
    buffer = io.BytesIO()
    fig.savefig(buffer, format="png", dpi=fig.dpi, metadata={"Software": None},
                bbox_inches="tight")
    return "data:image/png;base64," + base64.b64encode(buffer.getvalue()).decode("ascii")


def power_curve(days: np.ndarray, *, v0_mm3: float, k_per_day: float, beta: float,
                day_start: float) -> np.ndarray:
    """Volume (mm³) of the power law dV/dt = alpha * V**beta at ``days``.

    Uses V(t) = V0 * (1 + (1 - beta) * k * (t - t0)) ** (1 / (1 - beta)) with
    k = alpha * V0 ** (beta - 1), and V0 * exp(k * (t - t0)) when beta = 1. Where the law has no
    positive solution (extinction for beta < 1, blow-up for beta > 1) the value is NaN.

    Examples
    --------
    >>> power_curve(np.array([0.0, 1.0, 2.0]), v0_mm3=1.0, k_per_day=2.0, beta=0.5,
    ...             day_start=0.0).tolist()
    [1.0, 4.0, 9.0]
    """
    t = np.asarray(days, dtype=float) - day_start
    if abs(1.0 - beta) < 1e-9:
        return v0_mm3 * np.exp(k_per_day * t)
    base = 1.0 + (1.0 - beta) * k_per_day * t
    with np.errstate(invalid="ignore", divide="ignore", over="ignore"):
        volume = v0_mm3 * np.where(base > 0, base, np.nan) ** (1.0 / (1.0 - beta))
    return np.where(np.isfinite(volume), volume, np.nan)


def _growth_rate(row: pd.Series) -> float:
    """k (1/day) from a fits row: ``k_per_day`` if present, else alpha * V0**(beta - 1)."""
    k = row.get("k_per_day", np.nan)
    if _finite(k):
        return float(k)
    alpha = row.get("alpha", np.nan)
    if _finite(alpha) and _finite(row.get("v0_mm3")) and row["v0_mm3"] > 0:
        return float(alpha) * float(row["v0_mm3"]) ** (float(row["beta"]) - 1.0)
    return np.nan


def _finite(value: object) -> bool:
    try:
        return math.isfinite(float(value))  # type: ignore[arg-type]
    except (TypeError, ValueError):
        return False


def drawable_power_fits(fits: pd.DataFrame) -> pd.DataFrame:
    """The power-law rows of ``fits`` whose curve can be drawn (V0, k or alpha, beta, days)."""
    if fits.empty or "model" not in fits or "lesion" not in fits:
        return pd.DataFrame(columns=["lesion"])
    power = fits[fits["model"].astype(str) == "power"]
    needed = ["v0_mm3", "beta", "day_start", "day_end"]
    if any(c not in power for c in needed):
        return power.iloc[0:0]
    ok = power[needed].apply(pd.to_numeric, errors="coerce").notna().all(axis=1)
    rates = power.apply(_growth_rate, axis=1) if len(power) else pd.Series(dtype=float)
    return power[ok & rates.notna()]


def timeline_figure(series: pd.DataFrame, fits: pd.DataFrame, events: pd.DataFrame, *,
                    dpi: int = 72) -> str | None:
    """Lesion volumes over days on a log scale, fitted power laws per phase, events marked.

    ``series``: longitudinal rows of one subject (lesion, day, volume_mm3, status).
    ``fits``: fits rows of the subject. ``events``: subject's events (day, event, lesion).
    Absent lesions (volume 0) are drawn as hollow markers on the lower edge.
    Returns None when there is no positive volume to draw.
    """
    volumes = pd.to_numeric(series.get("volume_mm3"), errors="coerce")
    positive = volumes[volumes > 0]
    if positive.empty:
        return None
    floor = float(positive.min()) / 3.0
    fig = Figure(figsize=(8.4, 3.4), dpi=dpi)
    ax = fig.add_subplot()
    drawable = drawable_power_fits(fits)
    for index, (lesion, rows) in enumerate(series.groupby("lesion", sort=True)):
        colour = SERIES_COLOURS[index % len(SERIES_COLOURS)]
        marker = SERIES_MARKERS[index % len(SERIES_MARKERS)]
        rows = rows.sort_values("day")
        vol = pd.to_numeric(rows["volume_mm3"], errors="coerce")
        seen = rows[vol > 0]
        ax.plot(seen["day"], seen["volume_mm3"], marker=marker, color=colour, linewidth=0.8,
                markersize=4, label=f"lesion {_lesion_text(lesion)}")
        gone = rows[vol == 0]
        ax.plot(gone["day"], [floor] * len(gone), linestyle="none", marker=marker,
                markerfacecolor="none", color=colour, markersize=5)
        own = drawable[drawable["lesion"] == lesion] if "lesion" in drawable else drawable
        for _, fit in own.iterrows():
            days = np.linspace(float(fit["day_start"]), float(fit["day_end"]), 80)
            curve = power_curve(days, v0_mm3=float(fit["v0_mm3"]), k_per_day=_growth_rate(fit),
                                beta=float(fit["beta"]), day_start=float(fit["day_start"]))
            ax.plot(days, curve, linestyle="--", color=colour, linewidth=1.1)
    ax.set_yscale("log")
    _mark_events(ax, events)
    ax.set_xlabel("day (from the subject's first session)")
    ax.set_ylabel("volume (mm³)")
    ax.grid(True, which="major", color="#dddddd", linewidth=0.5)
    handles, labels = ax.get_legend_handles_labels()
    if handles:
        ax.legend(handles, labels, fontsize=6, loc="upper left", bbox_to_anchor=(1.01, 1.0),
                  ncol=max(1, math.ceil(len(handles) / 14)), frameon=False)
    fig.subplots_adjust(left=0.09, right=0.80, bottom=0.15, top=0.9)
    ax.set_title("dashed: fitted power law per phase; hollow marker: lesion absent", fontsize=7)
    return png_data_uri(fig)


def _lesion_text(value: object) -> str:
    return str(int(value)) if _finite(value) and float(value) == int(float(value)) \
        else str(value)


def _mark_events(ax, events: pd.DataFrame) -> None:
    if events is None or events.empty or "day" not in events:
        return
    top = ax.get_ylim()[1]
    for _, event in events.iterrows():
        day = pd.to_numeric(pd.Series([event.get("day")]), errors="coerce").iloc[0]
        if not _finite(day):
            continue
        label = str(event.get("event", "event"))
        if _finite(event.get("lesion")):
            label += f" (lesion {_lesion_text(event['lesion'])})"
        ax.axvline(float(day), color=EVENT_COLOUR, linestyle=":", linewidth=1.2)
        ax.text(float(day), top, " " + label, rotation=90, va="top", ha="right", fontsize=6,
                color=EVENT_COLOUR)


def beta_figure(betas: Sequence[float], groups: pd.DataFrame, *, dpi: int = 72) -> str | None:
    """Histogram of per-lesion beta with each group's beta and interval drawn over it."""
    values = np.array([b for b in betas if _finite(b)], dtype=float)
    group_rows = groups[pd.to_numeric(groups.get("beta"), errors="coerce").notna()] \
        if not groups.empty and "beta" in groups else groups.iloc[0:0]
    if values.size == 0 and group_rows.empty:
        return None
    fig = Figure(figsize=(6.4, 2.6), dpi=dpi)
    ax = fig.add_subplot()
    if values.size:
        ax.hist(values, bins=min(20, max(5, values.size)), color=SKY_BLUE, edgecolor=BLUE,
                label="per-lesion beta (power law)")
    styles = ("-", "--", "-.", ":")
    for index, (_, row) in enumerate(group_rows.iterrows()):
        colour = (VERMILLION, BLUISH_GREEN, REDDISH_PURPLE, BLACK)[index % 4]
        label = f"{row.get('group') or 'all'} / {row.get('phase', '')}"
        ax.axvline(float(row["beta"]), color=colour, linestyle=styles[index % 4], linewidth=1.5,
                   label=f"group {label}")
        low, high = row.get("beta_ci_low"), row.get("beta_ci_high")
        if _finite(low) and _finite(high):
            ax.axvspan(float(low), float(high), color=colour, alpha=0.12)
    ax.axvline(1.0, color="#999999", linewidth=0.8)
    ax.set_xlabel("beta (exponent of dV/dt = alpha·V^beta; 1 = exponential)")
    ax.set_ylabel("lesions")
    ax.legend(fontsize=6, loc="upper left", bbox_to_anchor=(1.01, 1.0), frameon=False)
    fig.subplots_adjust(left=0.08, right=0.70, bottom=0.2, top=0.95)
    return png_data_uri(fig)


@dataclass(frozen=True)
class SlicePanel:
    """One session's axial slice around a lesion, in RAS orientation (axis 0 = x, axis 1 = y).

    ``track`` holds lesion ids; ``image`` the MRI crop (or None); ``extent`` is
    (left, right, bottom, top) in mm relative to the lesion's centre.
    """

    title: str
    track: np.ndarray | None
    image: np.ndarray | None
    extent: tuple[float, float, float, float]
    window: tuple[float, float] | None = None   # grey levels shown black..white


def axial_crop(volume: np.ndarray, affine: np.ndarray, world_mm: np.ndarray, half_mm: float,
               *, fill: float = 0) -> tuple[np.ndarray, tuple[float, float, float, float]] | None:
    """Axial slice of an RAS-canonical ``volume`` through ``world_mm``, cropped to ±half_mm.

    Returns (2-D array, extent) or None when the point lies outside the volume's slices.

    Examples
    --------
    >>> vol = np.arange(27).reshape(3, 3, 3)
    >>> crop, extent = axial_crop(vol, np.eye(4), np.array([1.0, 1.0, 2.0]), 1.0)
    >>> crop.tolist(), extent
    ([[2, 5, 8], [11, 14, 17], [20, 23, 26]], (-1.5, 1.5, -1.5, 1.5))
    >>> axial_crop(np.ones((2, 2, 1), np.uint8), np.eye(4), np.zeros(3), 1.0, fill=-1)[0]
    array([[-1, -1, -1],
           [-1,  1,  1],
           [-1,  1,  1]], dtype=int16)
    """
    ijk = np.linalg.solve(affine, np.append(world_mm, 1.0))[:3]
    k = int(round(ijk[2]))
    if not 0 <= k < volume.shape[2]:
        return None
    zooms = np.sqrt((affine[:3, :2] ** 2).sum(axis=0))
    half = [min(512, max(1, int(math.ceil(half_mm / z)))) for z in zooms]   # bounded memory
    centre = [int(round(c)) for c in ijk[:2]]
    dtype = np.result_type(volume.dtype, np.min_scalar_type(fill))  # uint8 with fill -1: int16
    out = np.full((2 * half[0] + 1, 2 * half[1] + 1), fill, dtype=dtype)
    lo = [c - h for c, h in zip(centre, half)]
    src = [slice(max(0, lo[a]), min(volume.shape[a], lo[a] + out.shape[a])) for a in (0, 1)]
    dst = [slice(s.start - lo[a], s.stop - lo[a]) for a, s in enumerate(src)]
    if all(s.stop > s.start for s in src):
        out[dst[0], dst[1]] = volume[src[0], src[1], k]
    extent = (-(half[0] + 0.5) * zooms[0], (half[0] + 0.5) * zooms[0],
              -(half[1] + 0.5) * zooms[1], (half[1] + 0.5) * zooms[1])
    return out, tuple(float(e) for e in extent)  # type: ignore[return-value]


def lesion_slices_figure(panels: Sequence[SlicePanel], lesion: int, *, per_row: int = 6,
                         dpi: int = 72) -> str:
    """One small panel per session: this lesion outlined solid orange, other lesions dashed blue.

    Over the MRI crop when there is one, otherwise over the track image (lesions shaded grey).
    Outside the scan (track value -1 from :func:`axial_crop` with ``fill=-1``, or NaN in the
    image) stays white.
    """
    cols = max(1, min(per_row, len(panels)))
    rows = max(1, math.ceil(len(panels) / cols))
    row_in, title_in = 2.15, 0.34  # inches per row, of which the two-line title takes this
    fig = Figure(figsize=(1.9 * cols, row_in * rows), dpi=dpi)
    fig.subplots_adjust(left=0.01, right=0.99, bottom=0.01 / rows,
                        top=1.0 - title_in / (row_in * rows), wspace=0.05,
                        hspace=title_in / (row_in - title_in))
    for index, panel in enumerate(panels):
        ax = fig.add_subplot(rows, cols, index + 1)
        ax.set_xticks([])
        ax.set_yticks([])
        ax.set_title(panel.title, fontsize=7)
        if panel.track is None:
            ax.set_facecolor("#eeeeee")
            ax.text(0.5, 0.5, "no slice", ha="center", va="center", fontsize=7,
                    transform=ax.transAxes)
            continue
        _draw_panel(ax, panel, lesion)
    return png_data_uri(fig)


def _draw_panel(ax, panel: SlicePanel, lesion: int) -> None:
    track = panel.track
    assert track is not None
    kwargs = {"origin": "lower", "extent": panel.extent, "interpolation": "nearest"}
    ax.set_facecolor("white")  # outside the scan
    if panel.image is not None:
        finite = panel.image[np.isfinite(panel.image)]
        low, high = panel.window or (np.percentile(finite, [1, 99]) if finite.size
                                     else (0.0, 1.0))
        ax.imshow(panel.image.T, cmap="gray", vmin=low, vmax=max(high, low + 1e-6), **kwargs)
    else:
        shade = np.where(track > 0, 0.55, np.where(track < 0, np.nan, 0.12))
        ax.imshow(shade.T, cmap="gray", vmin=0, vmax=1, **kwargs)
    for mask, colour, width, style in (((track > 0) & (track != lesion), SKY_BLUE, 1.1, "--"),
                                       (track == lesion, ORANGE, 1.5, "-")):
        if mask.any() and min(mask.shape) >= 2:
            ax.contour(mask.T.astype(float), levels=[0.5], colors=[colour], linewidths=width,
                       linestyles=style, origin="lower", extent=panel.extent)
    ax.text(0.97, 0.5, "R", transform=ax.transAxes, ha="right", va="center", fontsize=6,
            color=BLACK, bbox={"facecolor": "white", "edgecolor": "none", "pad": 0.8})
