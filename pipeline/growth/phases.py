"""Split each lesion's series into treatment phases and mark which sessions enter the fits.

Rules (docs/outputs.md §4.7 and §5.7, ``fits.tsv``): a lesion is ``untreated`` before the first
event that applies to it,
then ``after-<event>`` (``after-<event>-2`` for the second event of the same name, and so on). A
session on an event's day belongs to the phase before it (imaging precedes treatment that day).
An event with a ``lesion`` applies to that lesion only; without one, to every lesion of the subject.
Several events on the same day open one phase named after all of them joined by ``+`` in the
order of the events table (``after-resection+radiosurgery``).

Which sessions enter the fits (``in_fit``), and why not (``fit_exclusion``):

- ``merged``: the lesion was absorbed by another (``status`` merged, no volume of its own);
- ``merged-sum``: a survivor's session from a merge on (``merged_from`` not empty): its volume
  is the sum of the parents, left out unless ``FitSettings.fit_merged_sum``;
- ``absent``: volume 0 (lesion not found) and ``below-detection``: volume at or below
  ``FitSettings.detection_limit_mm3``. These are **left out** (never logged, never replaced by a
  small number); they are not treated as censored observations. The fit rows say how many were
  left out in their ``note``;
- ``missing``: no volume (``n/a``) for any other reason;
- ``before-nadir``: in a phase after an event, with ``FitSettings.from_nadir`` (default), the
  sessions before the phase's nadir are left out, so the fit describes the regrowth, not the
  response. The nadir is the **earliest** session whose volume lies within the measurement
  noise of the phase's smallest volume: V <= V_min exp(z sqrt(2) sigma), with sigma the
  ln-volume SD (``measurement_error``, else ``nadir_noise_sd``) and z the normal quantile of
  ``confidence`` (two-sided): the largest difference two measurements of one volume show at
  that level (common practice). A lesion that simply keeps growing thus loses no session to
  noise. An absent session counts as volume 0 (then only absent sessions are at the nadir).
"""
from __future__ import annotations

import numpy as np
import pandas as pd
from scipy import stats

from pipeline.errors import UsageError
from pipeline.settings import FitSettings

__all__ = ["assign_phases", "COLUMNS"]

COLUMNS: dict[str, dict] = {
    "phase": {"Description": "Treatment phase of the session: 'untreated' before the first event "
                             "that applies to the lesion, then 'after-<event>' ('after-<event>-2' "
                             "for a repeat); a session on an event's day belongs to the phase "
                             "before it.", "Units": "n/a"},
    "in_fit": {"Description": "True when the session enters the per-lesion and group fits.",
               "Units": "n/a"},
    "fit_exclusion": {
        "Description": "Why the session is left out of the fits ('' when it is in).",
        "Units": "n/a",
        "Levels": {"": "in the fits",
                   "absent": "volume 0 (lesion not found); left out, not censored",
                   "below-detection": "volume at or below detection_limit_mm3; left out",
                   "missing": "no volume recorded",
                   "merged": "lesion absorbed by another lesion at this session",
                   "merged-sum": "volume is the sum after a merge (fit_merged_sum is false)",
                   "before-nadir": "before the nadir of a post-treatment phase (from_nadir; "
                                   "the earliest session within measurement noise of the "
                                   "smallest volume)"}},
}

_LONGITUDINAL = ("subject", "lesion", "day", "volume_mm3")
_EVENTS = ("subject", "day", "event")


def _check(table: pd.DataFrame, needed: tuple[str, ...], what: str) -> None:
    missing = [c for c in needed if c not in table.columns]
    if missing:
        raise UsageError(f"{what} lacks column(s) {', '.join(missing)}; "
                         f"it needs {', '.join(needed)}")


def _clean_events(events: pd.DataFrame | None) -> pd.DataFrame:
    empty = pd.DataFrame({"subject": pd.Series(dtype=str), "day": pd.Series(dtype=float),
                          "event": pd.Series(dtype=str), "lesion": pd.Series(dtype=float)})
    if events is None or len(events) == 0:
        return empty
    _check(events, _EVENTS, "events table")
    out = pd.DataFrame({"subject": events["subject"].astype(str),
                        "day": pd.to_numeric(events["day"], errors="coerce"),
                        "event": events["event"].astype(str).str.split().str.join(" "),
                        "lesion": pd.to_numeric(events["lesion"], errors="coerce")
                        if "lesion" in events.columns else np.nan})
    bad = out["day"].isna() | (out["event"] == "")
    if bad.any():
        row = int(np.flatnonzero(bad.to_numpy())[0])
        raise UsageError(f"events table row {row + 1}: needs a numeric day and an event name, "
                         f"got day={events['day'].iloc[row]!r} event={events['event'].iloc[row]!r}")
    out["order"] = np.arange(len(out))
    return out.sort_values(["subject", "day", "order"], kind="stable")


def _phase_names(days: np.ndarray, names: list[str]) -> tuple[np.ndarray, list[str]]:
    """Distinct event days (sorted) and the phase name opened on each."""
    uniq = np.unique(days)
    labels, seen = [], {}
    for day in uniq:
        label = "+".join(dict.fromkeys(n for d, n in zip(days, names) if d == day))
        seen[label] = seen.get(label, 0) + 1
        labels.append(f"after-{label}" + (f"-{seen[label]}" if seen[label] > 1 else ""))
    return uniq, labels


def _phases_of_lesion(day: np.ndarray, subject_events: pd.DataFrame, lesion: int) -> np.ndarray:
    applies = subject_events["lesion"].isna() | (subject_events["lesion"] == lesion)
    chosen = subject_events[applies.to_numpy()]
    out = np.full(len(day), "untreated", dtype=object)
    if len(chosen) == 0:
        return out
    event_days, labels = _phase_names(chosen["day"].to_numpy(float), chosen["event"].tolist())
    # number of event days strictly before the session: a session on an event day is before it
    index = np.searchsorted(event_days, day, side="left")
    for i, label in enumerate(labels, start=1):
        out[index == i] = label
    return out


def _exclusions(table: pd.DataFrame, settings: FitSettings) -> np.ndarray:
    volume = pd.to_numeric(table["volume_mm3"], errors="coerce").to_numpy(float)
    status = (table["status"].astype(str).to_numpy() if "status" in table
              else np.full(len(table), ""))
    merged_from = (table["merged_from"] if "merged_from" in table
                   else pd.Series("", index=table.index))
    has_sum = merged_from.notna().to_numpy() & ~merged_from.astype(str).isin(
        ["", "n/a", "nan", "None"]).to_numpy()
    reason = np.full(len(table), "", dtype=object)
    reason[~np.isfinite(volume)] = "missing"
    reason[(volume > 0) & (volume <= settings.detection_limit_mm3)] = "below-detection"
    reason[volume == 0] = "absent"
    reason[(volume < 0)] = "missing"
    reason[(reason == "") & has_sum & (not settings.fit_merged_sum)] = "merged-sum"
    reason[status == "merged"] = "merged"
    return reason


def nadir_tolerance(settings: FitSettings) -> float:
    """ln of the factor above the smallest volume that still counts as the nadir.

    Examples
    --------
    >>> round(nadir_tolerance(FitSettings()), 4)          # 1.96 * sqrt(2) * 0.1
    0.2772
    """
    sigma = settings.measurement_error or settings.nadir_noise_sd
    return float(stats.norm.ppf(0.5 * (1.0 + settings.confidence)) * np.sqrt(2.0) * sigma)


def _nadir_rule(table: pd.DataFrame, reason: np.ndarray, settings: FitSettings) -> np.ndarray:
    """Mark sessions before the nadir of every post-treatment (subject, lesion, phase)."""
    reason = reason.copy()
    volume = pd.to_numeric(table["volume_mm3"], errors="coerce").to_numpy(float)
    # absent sessions count as volume 0 for locating the nadir; other exclusions do not count
    usable = np.isin(reason, ["", "absent", "below-detection"])
    chosen = usable & (table["phase"].to_numpy() != "untreated")
    if not chosen.any():
        return reason
    work = pd.DataFrame({"subject": table["subject"].astype(str).to_numpy()[chosen],
                         "lesion": table["lesion"].to_numpy()[chosen],
                         "phase": table["phase"].to_numpy()[chosen],
                         "day": pd.to_numeric(table["day"], errors="coerce").to_numpy()[chosen],
                         "value": np.where(reason == "", volume, 0.0)[chosen],
                         "row": np.flatnonzero(chosen)})
    work = work.sort_values(["subject", "lesion", "phase", "day", "row"], kind="stable")
    groups = work.groupby(["subject", "lesion", "phase"], sort=False)
    position = groups.cumcount().to_numpy()
    low = groups["value"].transform("min") * np.exp(nadir_tolerance(settings))
    near = (work["value"] <= low).to_numpy()
    nadir = pd.Series(np.where(near, position, len(work)), index=work.index).groupby(
        [work["subject"], work["lesion"], work["phase"]], sort=False).transform("min").to_numpy()
    rows = work["row"].to_numpy()[position < nadir]       # earliest session near the minimum
    reason[rows[reason[rows] == ""]] = "before-nadir"
    return reason


def assign_phases(longitudinal: pd.DataFrame, events: pd.DataFrame | None = None, *,
                  settings: FitSettings = FitSettings()) -> pd.DataFrame:
    """Add ``phase``, ``in_fit`` and ``fit_exclusion`` to a longitudinal table.

    Parameters
    ----------
    longitudinal : pandas.DataFrame
        ``longitudinal.tsv`` rows: subject, lesion, session, day, volume_mm3 (0 when absent,
        ``nan`` when merged), status, merged_from, ... Not modified.
    events : pandas.DataFrame, optional
        subject, day, event and optional lesion (``nan`` = every lesion of the subject).
    settings : FitSettings
        ``from_nadir``, ``fit_merged_sum``, ``detection_limit_mm3``.

    Returns
    -------
    pandas.DataFrame
        A copy of ``longitudinal`` (same row order) with ``phase`` (str), ``in_fit`` (bool) and
        ``fit_exclusion`` (str, '' when in the fit).

    Examples
    --------
    >>> lon = pd.DataFrame({"subject": "01", "lesion": 1, "session": ["a", "b", "c", "d"],
    ...                     "day": [0.0, 30, 60, 90], "volume_mm3": [100.0, 150, 40, 80],
    ...                     "status": "present"})
    >>> ev = pd.DataFrame({"subject": ["01"], "day": [30.0], "event": ["radiosurgery"]})
    >>> assign_phases(lon, ev)[["phase", "in_fit"]].values.tolist()
    [['untreated', True], ['untreated', True],
     ['after-radiosurgery', True], ['after-radiosurgery', True]]
    """
    _check(longitudinal, _LONGITUDINAL, "longitudinal table")
    out = longitudinal.copy()
    ev = _clean_events(events)
    phase = np.full(len(out), "untreated", dtype=object)
    days = pd.to_numeric(out["day"], errors="coerce").to_numpy(float)
    subjects = out["subject"].astype(str).to_numpy()
    lesions = pd.to_numeric(out["lesion"], errors="coerce").to_numpy(float)
    by_subject = dict(tuple(ev.groupby("subject", sort=False)))
    tracks = pd.DataFrame({"s": subjects, "l": lesions}).groupby(["s", "l"], sort=False).indices
    for (subject, lesion), rows in tracks.items():
        if subject in by_subject:
            phase[rows] = _phases_of_lesion(days[rows], by_subject[subject], lesion)
    out["phase"] = phase
    reason = _exclusions(out, settings)
    if settings.from_nadir:
        reason = _nadir_rule(out, reason, settings)
    out["fit_exclusion"] = reason
    out["in_fit"] = reason == ""
    return out
