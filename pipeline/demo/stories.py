"""The invented demo cohort's plan: growth segments, lesion and subject plans, and the twelve
scenario stories (all made up; no real patient contributed anything). Used by
:mod:`pipeline.demo`, which draws and writes the files. Research use only."""
from __future__ import annotations

import datetime as dt
from dataclasses import dataclass, field
from typing import Callable

import numpy as np

from pipeline.demo import shapes as synth

DETECTION_LIMIT_MM3 = 15.0     # a lesion below this volume is not drawn (absent)
MIN_DRAWN_MM3 = 30.0           # every drawn component is at least this large
MAX_VOLUME_MM3 = 20000.0
GAP_MM = 5.0                   # surface gap between separate components (> 3.3 mm voxel diagonal)


def power_law_volume(v0: float, alpha: float, beta: float, t: float) -> float:
    """Closed form of dV/dt = alpha V^beta with V(0) = v0.

    >>> round(power_law_volume(100.0, 0.01, 1.0, 69.314718), 4)
    200.0
    >>> round(power_law_volume(8.0, 1.0, 2 / 3, 3.0), 9)   # cube root grows by alpha/3 per day
    27.0
    """
    if abs(beta - 1.0) < 1e-12:
        return float(v0 * np.exp(alpha * t))
    return float((v0 ** (1.0 - beta) + alpha * (1.0 - beta) * t) ** (1.0 / (1.0 - beta)))


@dataclass(frozen=True)
class Segment:
    """One power-law piece of a lesion's volume curve, valid on (day_start, day_end]."""

    phase: str
    kind: str
    day_start: float
    day_end: float
    v0_mm3: float
    alpha: float
    beta: float

    def volume(self, day: float) -> float:
        return power_law_volume(self.v0_mm3, self.alpha, self.beta, day - self.day_start)

    def record(self) -> dict:
        blowup = None                  # finite-time singularity t* of a growing law, beta > 1
        if self.beta > 1 and self.alpha > 0:
            blowup = self.day_start + self.v0_mm3 ** (1 - self.beta) / self.alpha / (self.beta - 1)
        return {"phase": self.phase, "kind": self.kind, "day_start": self.day_start,
                "day_end": self.day_end, "law": "power", "v0_mm3": self.v0_mm3,
                "alpha": self.alpha, "beta": self.beta,
                "k_per_day": self.alpha * self.v0_mm3 ** (self.beta - 1),
                "v_end_mm3": self.volume(self.day_end), "blowup_day": blowup}


def _segment(phase: str, kind: str, d0: float, d1: float, v0: float, beta: float, *,
             hit: tuple[float, float]) -> Segment:
    """Segment from (d0, v0) whose law passes through ``hit`` = (day, volume)."""
    day, v = hit
    if abs(beta - 1.0) < 1e-12:
        alpha = np.log(v / v0) / (day - d0)
    else:
        alpha = (v ** (1 - beta) - v0 ** (1 - beta)) / ((1 - beta) * (day - d0))
    return Segment(phase, kind, float(d0), float(d1), float(v0), float(alpha), float(beta))


@dataclass(eq=False)
class LesionPlan:
    """Volume curve, events and geometry of one invented lesion."""

    key: str
    v0_mm3: float
    first_day: float = 0.0
    segments: list[Segment] = field(default_factory=list)
    hidden: tuple[float, ...] = ()            # session days below detection (absent)
    split: tuple[float, float] | None = None  # (day, volume fraction of the first piece)
    partner: LesionPlan | None = None         # the lesion this one absorbs ...
    merge_day: float | None = None            # ... from this day on (also set on the absorbed)
    absorbed_by: LesionPlan | None = None
    resection_day: float | None = None
    anchor: np.ndarray = field(default_factory=lambda: np.zeros(3))
    direction: np.ndarray = field(default_factory=lambda: np.array([1.0, 0.0, 0.0]))
    aspect: tuple[float, float, float] | None = None    # drawn unless the story sets it
    rotation: np.ndarray = field(default_factory=lambda: np.eye(3))
    shear: tuple[float, ...] = (0.0,) * 6
    split_offsets: tuple[float, float] = (0.0, 0.0)

    def then(self, phase: str, kind: str, day_end: float, beta: float, *, fold: float = 1.0,
             hit: tuple[float, float] | None = None, v0: float | None = None) -> LesionPlan:
        """Append a segment from the end of the last one (or ``v0``) to ``day_end``."""
        d0 = self.segments[-1].day_end if self.segments else self.first_day
        start = v0 if v0 is not None else (self.segments[-1].volume(d0) if self.segments
                                           else self.v0_mm3)
        self.segments.append(_segment(phase, kind, d0, day_end, start, beta,
                                      hit=hit or (day_end, start * fold)))
        return self

    def volume(self, day: float) -> float:
        """Volume given by the law of the segment holding ``day``."""
        seg = next((s for s in self.segments if day <= s.day_end), self.segments[-1])
        return seg.volume(day)

    def _blob(self, volume: float, centroid: np.ndarray) -> synth.Blob:
        core = 0.55 if volume >= 1000.0 else 0.0
        return synth.place_blob(volume, centroid, aspect=self.aspect, rotation=self.rotation,
                                shear=self.shear, core=core)

    def blobs(self, day: float) -> list[synth.Blob]:
        """The components drawn at ``day`` (empty when absent, merged or not yet there)."""
        if day < self.first_day or day in self.hidden:
            return []
        if self.absorbed_by is not None and day >= self.merge_day:
            return []
        v = self.volume(day)
        if self.partner is not None and day >= self.merge_day:
            return [self._merged_blob(day, v)]
        anchor = self.anchor
        if self.resection_day is not None and day > self.resection_day:
            before = self.volume(self.resection_day)
            anchor = anchor + 0.5 * np.cbrt(3 * before / (4 * np.pi)) * self.direction
        if self.split is not None and day >= self.split[0]:
            f, (d1, d2), axis = self.split[1], self.split_offsets, self.rotation[:, 0]
            return [self._blob(f * v, anchor - d1 * axis),       # along the long axis
                    self._blob((1 - f) * v, anchor + d2 * axis)]
        return [self._blob(v, anchor)]

    def _merged_blob(self, day: float, v: float) -> synth.Blob:
        """One elongated body spanning both former sites, volume = sum of both laws."""
        other = self.partner
        vp = other.volume(day)
        join = other.anchor - self.anchor
        radius = np.cbrt(3 * np.array([v, vp]) / (4 * np.pi))
        length = 0.5 * np.linalg.norm(join) + 0.6 * radius.mean()
        width = np.sqrt((v + vp) / (4 / 3 * np.pi * length * 0.9))
        centroid = 0.5 * (self.anchor + other.anchor)
        return synth.place_blob(v + vp, centroid, aspect=(1.0, width / length,
                                                          0.9 * width / length),
                                rotation=synth.frame(join), shear=self.shear,
                                core=0.55 if v + vp >= 1000 else 0.0)


@dataclass(eq=False)
class SubjectPlan:
    """Sessions, grids, lesions and events of one invented subject."""

    index: int
    subject: str
    group: str
    story: str
    days: list[int]
    grids: list[synth.Grid]
    lesions: list[LesionPlan]
    events: list[tuple[int, str, str | None]]
    multilabel: bool
    broken_session: int | None
    start_date: dt.date
    response: tuple[str, ...] = ()    # planned target-lesion category per session (or none)

    @property
    def sessions(self) -> list[str]:
        return [f"{s + 1:02d}" for s in range(len(self.days))]

    def first_session(self, lesion: LesionPlan) -> int:
        return next(s for s, d in enumerate(self.days) if lesion.blobs(d))

    def lesion_ids(self) -> dict[str, int]:
        """Ids as docs/outputs.md §4.5 numbers them: first appearance, ties by larger volume."""
        def order(les: LesionPlan) -> tuple[int, float]:
            s = self.first_session(les)
            return s, -sum(b.volume_mm3 for b in les.blobs(self.days[s]))
        return {les.key: i + 1 for i, les in enumerate(sorted(self.lesions, key=order))}


# ------------------------------------------------------------------ stories (one per subject)
def _days(rng: np.random.Generator, n: int, span: tuple[float, float] = (400, 700),
          tail: tuple[int, tuple[int, int]] = (0, (40, 55))) -> list[int]:
    """Session days from 0: ``n`` sessions over a total span drawn from ``span`` days; the last
    ``tail[0]`` intervals are drawn from ``tail[1]`` (close follow-up)."""
    n_tail, (lo, hi) = tail
    close = [int(v) for v in rng.integers(lo, hi + 1, n_tail)]
    weights = rng.uniform(0.88, 1.12, n - 1 - n_tail)
    head = np.round((rng.uniform(*span) - sum(close)) * weights / weights.sum())
    return [0] + [int(v) for v in np.cumsum([*head, *close])]


def _grow(key: str, v0: float, day_end: float, fold: float, beta: float,
          first_day: float = 0.0) -> LesionPlan:
    return LesionPlan(key, v0, first_day).then("untreated", "growth", day_end, beta, fold=fold)


Story = Callable[[np.random.Generator], tuple]


def _regrowth(rng):
    """Radiosurgery, shrink to a nadir, regrowth with beta < 1; a second untreated lesion."""
    u, days = rng.uniform, _days(rng, 6)
    e = days[2] + int(rng.integers(2, 11))
    a = _grow("A", np.exp(u(np.log(400), np.log(1100))), e, u(2.5, 4), u(1.3, 1.7))
    a.then("after-radiosurgery", "decline", days[3], 1.0, fold=u(0.25, 0.45))
    a.then("after-radiosurgery", "regrowth", days[5], u(0.55, 0.85), fold=u(2.5, 4))
    b = _grow("B", a.v0_mm3 / u(1.8, 3.5), days[5], u(4, 9), u(1.2, 1.8))
    return days, [a, b], [(e, "radiosurgery", "A")], dict(multilabel=False)


def _chemo_multilabel(rng):
    """Large lesions with necrotic core and edema (labels 1, 2, 3); chemotherapy shrinks both."""
    u, days = rng.uniform, _days(rng, 5)
    e = days[1] + 7
    a = _grow("A", u(2500, 6000), e, u(1.4, 2.0), u(1.2, 1.5))
    b = _grow("B", a.v0_mm3 / u(2, 4), e, u(1.8, 3), u(1.3, 1.7))
    a.then("after-chemotherapy", "decline", days[4], 1.0, fold=u(0.3, 0.5))
    b.then("after-chemotherapy", "decline", days[4], 1.0, fold=u(0.4, 0.7))
    return days, [a, b], [(e, "chemotherapy", None)], dict(multilabel=True)


def _split(rng):
    """Radiosurgery; the shrinking lesion splits into two close nodules at session 4 that
    regrow; a second untreated lesion."""
    u, days = rng.uniform, _days(rng, 6)
    e = days[2] + int(rng.integers(2, 11))
    a = _grow("A", np.exp(u(np.log(600), np.log(1500))), e, u(3, 5), u(1.25, 1.6))
    a.then("after-radiosurgery", "decline", days[3], 1.0, fold=u(0.4, 0.55))
    a.then("after-radiosurgery", "regrowth", days[5], u(0.6, 0.85), fold=u(1.3, 1.7))
    a.split, a.aspect = (days[3], u(0.55, 0.65)), (1.0, 0.6, 0.55)
    b = _grow("B", a.v0_mm3 / u(2.5, 5), days[5], u(3, 8), u(1.3, 1.8))
    return days, [a, b], [(e, "radiosurgery", "A")], dict(multilabel=False)


def _merge(rng):
    """Two nearby lesions grow into one at session 4 (the larger keeps its id)."""
    u, days = rng.uniform, _days(rng, 6)
    fold = u(3, 5)
    a = _grow("A", np.exp(u(np.log(350), np.log(800))), days[5], fold, u(1.2, 1.6))
    b = _grow("B", a.v0_mm3 / u(1.7, 2.3), days[5], fold * u(0.85, 1.1), u(1.2, 1.6))
    c = _grow("C", b.v0_mm3 / u(1.6, 2.5), days[5], u(2, 5), u(1.2, 1.8))
    a.partner, b.absorbed_by, a.merge_day, b.merge_day = b, a, days[3], days[3]
    return days, [a, b, c], [], dict(multilabel=False)


def _new_lesion(rng):
    """Radiosurgery of the first lesion: a partial response, a new lesion at session 5 while it
    rests near its nadir (progression), then its own regrowth. The expected target-lesion
    categories (RANO-BM arithmetic, Lin NU et al. Lancet Oncol 2015) are planned with margins:
    the nadir volume is 8-12 % of baseline (diameter about -50 %, PR needs <= -30 %)."""
    u, days = rng.uniform, _days(rng, 6)
    e = days[2] + int(rng.integers(2, 11))
    a = _grow("A", u(600, 1000), e, u(2, 3), u(1.3, 1.7))
    a.then("after-radiosurgery", "decline", days[3], 1.0, fold=u(0.08, 0.12))
    a.then("after-radiosurgery", "decline", days[4], 1.0, fold=u(0.85, 0.95))
    a.then("after-radiosurgery", "regrowth", days[5], u(0.6, 0.85), fold=u(5, 8))
    n = _grow("N", u(60, 110), days[5], u(2, 4), u(1.3, 1.8), first_day=days[4])
    response = ("n/a", "n/a", "baseline", "PR", "PD", "PD")
    return days, [a, n], [(e, "radiosurgery", "A")], dict(multilabel=False, response=response)


def _vanish(rng):
    """Under chemotherapy a small lesion drops below detection at session 3 and is back at 4."""
    u, days = rng.uniform, _days(rng, 6)
    e = days[1] + 7
    a = _grow("A", u(600, 1500), e, u(1.3, 2), u(1.2, 1.6))
    a.then("after-chemotherapy", "decline", days[5], 1.0, fold=u(0.5, 0.7))
    b = _grow("B", u(60, 120), e, u(1.2, 1.6), u(1.3, 1.8))
    b.then("after-chemotherapy", "decline", days[2], 1.0, hit=(days[2], u(4, 9)))
    b.then("after-chemotherapy", "regrowth", days[5], u(0.6, 0.85), hit=(days[3], u(60, 120)))
    b.hidden = (days[2],)
    return days, [a, b], [(e, "chemotherapy", None)], dict(multilabel=False)


def _enlargement(rng):
    """Treatment-effect enlargement after radiosurgery (beta 2-3 over a short window)."""
    u, days = rng.uniform, _days(rng, 6, span=(420, 560), tail=(3, (40, 55)))
    e = days[2] + int(rng.integers(2, 8))
    a = _grow("A", np.exp(u(np.log(300), np.log(800))), e, u(2, 3.5), u(1.3, 1.7))
    a.then("after-radiosurgery", "enlargement", days[5], u(2.0, 3.0), fold=u(1.6, 2.4))
    b = _grow("B", a.v0_mm3 / u(1.8, 3), days[5], u(2.5, 6), u(1.2, 1.8))
    return days, [a, b], [(e, "radiosurgery", "A")], dict(multilabel=False, geometry="oblique")


def _resection(rng):
    """Resection of a large lesion; the residual at the cavity margin regrows."""
    u, days = rng.uniform, _days(rng, 5)
    e = days[1] + int(rng.integers(5, 16))
    a = _grow("A", u(3000, 8000), e, u(1.3, 1.8), u(1.2, 1.5))
    a.then("after-resection", "regrowth", days[4], u(0.6, 0.9), fold=u(3, 6), v0=u(45, 90))
    a.resection_day = e
    b = _grow("B", u(200, 600), days[4], u(3, 7), u(1.3, 1.8))
    return days, [a, b], [(e, "resection", "A")], dict(multilabel=True)


def _flipped(rng):
    """Radiosurgery of every lesion; follow-ups stored with flipped axes."""
    u, days = rng.uniform, _days(rng, 5)
    e = days[2] + int(rng.integers(2, 11))
    a = _grow("A", np.exp(u(np.log(400), np.log(1200))), e, u(1.8, 3), u(1.3, 1.7))
    b = _grow("B", a.v0_mm3 / u(1.8, 3), e, u(1.8, 3), u(1.3, 1.7))
    for les in (a, b):
        les.then("after-radiosurgery", "decline", days[4], 1.0, fold=u(0.3, 0.6))
    return days, [a, b], [(e, "radiosurgery", None)], dict(multilabel=False, geometry="flipped")


def _three(rng):
    """Three lesions over two years; chemotherapy slows growth to beta < 1."""
    u, days = rng.uniform, _days(rng, 7, span=(600, 720))
    e = days[2] + 7
    top = np.exp(u(np.log(800), np.log(1500)))
    lesions = []
    for key, v0 in zip("ABC", (top, top / u(1.6, 2.4), top / u(4, 6))):
        les = _grow(key, v0, e, u(2, 4), u(1.2, 1.8))
        lesions.append(les.then("after-chemotherapy", "growth", days[6], u(0.5, 0.9),
                                fold=u(1.5, 2.5)))
    return days, lesions, [(e, "chemotherapy", None)], dict(multilabel=False)


def _short(rng):
    """Four sessions: radiosurgery, nadir, regrowth."""
    u, days = rng.uniform, _days(rng, 4, span=(380, 460))
    e = days[1] + int(rng.integers(2, 11))
    a = _grow("A", np.exp(u(np.log(300), np.log(900))), e, u(2, 3), u(1.3, 1.7))
    a.then("after-radiosurgery", "decline", days[2], 1.0, fold=u(0.3, 0.5))
    a.then("after-radiosurgery", "regrowth", days[3], u(0.6, 0.85), fold=u(1.8, 3))
    return days, [a], [(e, "radiosurgery", "A")], dict(multilabel=False)


def _broken(rng):
    """Two untreated lesions; the last session's mask file is truncated."""
    u, days = rng.uniform, _days(rng, 5)
    a = _grow("A", np.exp(u(np.log(300), np.log(1000))), days[4], u(3, 7), u(1.2, 1.8))
    b = _grow("B", a.v0_mm3 / u(1.8, 3), days[4], u(3, 7), u(1.2, 1.8))
    return days, [a, b], [], dict(multilabel=False, broken=True)


STORIES: tuple[Story, ...] = (_regrowth, _chemo_multilabel, _split, _merge, _new_lesion, _vanish,
                              _enlargement, _resection, _flipped, _three, _short, _broken)
