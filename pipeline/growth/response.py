"""Radiographic response of target lesions per subject and session (``response.tsv``).

This is the **target-lesion radiographic component only**: a full RANO-BM assessment also needs
the non-target lesions, the corticosteroid dose, the clinical status and confirmation at a later
scan, and any response decision rests with the treating clinicians under the trial's rules.
Research use only; not a medical device (``pipeline.DISCLAIMER``).

Rules (RANO-BM: Lin NU et al. Lancet Oncol 2015;16:e270-e278; RECIST 1.1: Eisenhauer EA et al.
Eur J Cancer 2009;45:228-247):

- baseline: the subject's last session on or before the day of its first event (a session on an
  event's day precedes the treatment), else its first session;
- target lesions: up to ``max_targets`` (5) measurable lesions at baseline (longest axial
  diameter >= 10 mm, seen on >= 2 axial slices: ``measurable`` in ``lesions.tsv``), the largest
  first;
- a lesion's diameter is the sum of the longest axial diameters of its components (RECIST 1.1:
  the diameters of a fragmented lesion are added); an absent lesion counts 0 mm; a lesion merged
  into another is carried by the lesion that holds it (the coalesced lesion is measured once);
- CR: every target lesion gone (sum 0); PR: sum >= 30 % below baseline; PD: sum >= 20 % above
  the nadir (the smallest sum on study before the session, baseline included) together with an
  absolute rule (``absolute_rule``): ``lesion`` (default), at least one target lesion grown by
  >= 5 mm against its own diameter at the nadir session (RANO-BM, from memory of the published
  text, confirmed in a table reproducing it: "at least one lesion must increase by an absolute
  value of 5 mm or more"), or ``sum``, the sum grown by >= 5 mm (RECIST 1.1); a new lesion
  (first seen after baseline and present at the session) is PD; SD otherwise.

The volume columns are **research analogues**, not a RANO-BM or RECIST call: the sum of the
target lesions' volumes, with the thresholds of a sphere whose diameter changes by the published
fractions: 0.7^3 = 0.343 (-65.7 %) and 1.2^3 = 1.728 (+72.8 %); they have no absolute rule.
"""
from __future__ import annotations

import numpy as np
import pandas as pd

from pipeline.settings import ResponseSettings

__all__ = ["SCOPE", "COLUMNS", "SUMMARY_COLUMNS", "lesion_measures", "target_category",
           "assess_response", "summarize_response"]

SCOPE = ("target-lesion radiographic component only; a full RANO-BM call also needs non-target "
         "lesions, corticosteroid dose, clinical status and confirmation; decisions rest with "
         "the treating clinicians")
PR_FRACTION = 0.30                  # Lin et al. 2015; Eisenhauer et al. 2009
PD_FRACTION = 0.20                  # same sources
VOLUME_PR_PCT = -100.0 * (1.0 - 0.7 ** 3)      # -65.7 %: sphere whose diameter falls by 30 %
VOLUME_PD_PCT = 100.0 * (1.2 ** 3 - 1.0)       # +72.8 %: sphere whose diameter grows by 20 %
_EPS = 1e-9                         # tolerance of the threshold comparisons (mm or fraction)
_RANK = {"CR": 0, "PR": 1, "SD": 2, "PD": 3}

_CATEGORY_LEVELS = {"baseline": "the baseline session (targets chosen here)",
                    "CR": "complete response: every target lesion gone",
                    "PR": "partial response: sum >= 30 % below baseline",
                    "SD": "stable disease: neither PR nor PD",
                    "PD": "progressive disease: sum >= 20 % above nadir and the absolute rule, "
                          "or a new lesion",
                    "n/a": "before baseline, no target lesion, or a target not measured"}
COLUMNS: dict[str, dict] = {
    "subject": {"Description": "Subject label"},
    "session": {"Description": "Session label"},
    "day": {"Description": "Days from the subject's first session", "Units": "day"},
    "n_target": {"Description": "Number of target lesions (chosen at baseline, at most 5)"},
    "sum_diameters_mm": {"Description": "Sum of the target lesions' longest axial diameters "
                         "(0 for an absent lesion)", "Units": "mm"},
    "change_baseline_pct": {"Description": "Change of the sum vs baseline", "Units": "%"},
    "change_nadir_pct": {"Description": "Change of the sum vs the nadir (smallest sum on study "
                         "before this session, baseline included)", "Units": "%"},
    "new_lesions": {"Description": "Lesions first seen after baseline and present at this "
                    "session (each is progression)", "Units": "1"},
    "category": {"Description": "Target-lesion radiographic category (Lin NU et al. Lancet "
                 "Oncol 2015); not a full RANO-BM call", "Levels": _CATEGORY_LEVELS},
    "sum_volume_mm3": {"Description": "Research analogue: sum of the target lesions' volumes",
                       "Units": "mm^3"},
    "volume_change_baseline_pct": {"Description": "Research analogue: change of the volume sum "
                                   "vs baseline", "Units": "%"},
    "volume_category": {"Description": "Research analogue, not a RANO-BM or RECIST call: the "
                        "same categories on the volume sum with sphere-equivalent thresholds "
                        "(PR <= -65.7 %, PD >= +72.8 % vs the volume nadir; no absolute rule)",
                        "Levels": _CATEGORY_LEVELS},
    "change_baseline_mm": {"Description": "Change of the sum vs baseline", "Units": "mm"},
    "change_nadir_mm": {"Description": "Change of the sum vs the nadir", "Units": "mm"},
    "baseline_sum_mm": {"Description": "Sum of the target diameters at baseline", "Units": "mm"},
    "nadir_sum_mm": {"Description": "Nadir sum this session is compared with", "Units": "mm"},
    "nadir_session": {"Description": "Session of that nadir"},
    "max_lesion_growth_mm": {"Description": "Largest growth of one target lesion vs its diameter "
                             "at the nadir session", "Units": "mm"},
    "volume_change_nadir_pct": {"Description": "Research analogue: change of the volume sum vs "
                                "its nadir", "Units": "%"},
    "targets": {"Description": "Target lesion ids (longitudinal.tsv), largest first"},
    "absolute_rule": {"Description": "Absolute rule of progression used", "Levels": {
        "lesion": "one target lesion grown by >= absolute_mm (RANO-BM)",
        "sum": "the sum grown by >= absolute_mm (RECIST 1.1)"}},
    "scope": {"Description": "What this row is and is not: " + SCOPE},
}
SUMMARY_COLUMNS: dict[str, dict] = {
    "subject": {"Description": "Subject label"},
    "baseline_session": {"Description": "Session chosen as baseline"},
    "n_target": COLUMNS["n_target"],
    "best_response": {"Description": "Best target-lesion category up to the first PD (PD when "
                      "the first assessment is PD); unconfirmed", "Levels": _CATEGORY_LEVELS},
    "best_change_baseline_pct": {"Description": "Smallest change of the sum vs baseline "
                                 "(waterfall plot value)", "Units": "%"},
    "first_progression_day": {"Description": "Day of the first PD (n/a: none)", "Units": "day"},
    "response_start_day": {"Description": "Day of the first CR or PR", "Units": "day"},
    "response_duration_days": {"Description": "From the first CR/PR to the first PD after it, "
                               "or to the last assessment when none (response_ongoing)",
                               "Units": "day"},
    "response_ongoing": {"Description": "No PD after the response: the duration is censored",
                         "Levels": {"true": "censored", "false": "ended by PD"}},
    "best_volume_category": {"Description": "Research analogue: best volume category up to the "
                             "first volume PD", "Levels": _CATEGORY_LEVELS},
    "scope": COLUMNS["scope"],
}


def lesion_measures(longitudinal: pd.DataFrame, lesions: pd.DataFrame,
                    assignment: pd.DataFrame) -> pd.DataFrame:
    """One row per lesion and session with its diameter (mm) and RANO-BM measurability.

    Parameters
    ----------
    longitudinal : pandas.DataFrame
        ``longitudinal.tsv``: subject, lesion, session, day, volume_mm3, status (merged_into).
    lesions : pandas.DataFrame
        ``lesions.tsv``: subject, session, component, max_axial_diameter_mm, measurable.
    assignment : pandas.DataFrame
        Component -> lesion: subject, session, component, lesion.

    Returns
    -------
    pandas.DataFrame
        ``longitudinal``'s rows plus ``diameter_mm`` (sum over the lesion's components, 0 when
        it has none) and ``measurable`` (any of its components is).

    Examples
    --------
    >>> lon = pd.DataFrame({"subject": "01", "lesion": [1, 2], "session": "a", "day": 0.0,
    ...                     "volume_mm3": [900.0, 50.0], "status": "present"})
    >>> com = pd.DataFrame({"subject": "01", "session": "a", "component": [1, 2, 3],
    ...                     "max_axial_diameter_mm": [12.0, 4.0, 5.0],
    ...                     "measurable": [True, False, False]})
    >>> asg = pd.DataFrame({"subject": "01", "session": "a", "component": [1, 2, 3],
    ...                     "lesion": [1, 2, 2]})
    >>> lesion_measures(lon, com, asg)[["lesion", "diameter_mm", "measurable"]].values.tolist()
    [[1, 12.0, True], [2, 9.0, False]]
    """
    keys = ["subject", "session", "component"]
    parts = lesions[keys + ["max_axial_diameter_mm", "measurable"]].copy()
    parts["measurable"] = parts["measurable"].astype(str).str.lower().isin(["true", "1"])
    joined = assignment[keys + ["lesion"]].astype({"subject": str, "session": str}).merge(
        parts.astype({"subject": str, "session": str}), on=keys, how="left")
    joined["lesion"] = pd.to_numeric(joined["lesion"]).astype(int)
    per = joined.groupby(["subject", "session", "lesion"]).agg(
        diameter_mm=("max_axial_diameter_mm", "sum"), measurable=("measurable", "any"))
    out = longitudinal.astype({"subject": str, "session": str}).copy()
    out["lesion"] = pd.to_numeric(out["lesion"]).astype(int)
    out = out.merge(per.reset_index(), on=["subject", "session", "lesion"], how="left")
    out["diameter_mm"] = out["diameter_mm"].fillna(0.0).astype(float)
    out["measurable"] = out["measurable"].fillna(False).astype(bool)
    return out


def target_category(sum_mm: float, baseline_mm: float, nadir_mm: float, *,
                    lesion_growth_mm: float, new_lesions: int, rule: str = "lesion",
                    absolute_mm: float = 5.0) -> str:
    """Target-lesion category of one session from its sums (Lin et al. 2015).

    Parameters
    ----------
    sum_mm, baseline_mm, nadir_mm : float
        Sum of diameters now, at baseline and at the nadir before this session (mm).
    lesion_growth_mm : float
        Largest growth of one target lesion against its diameter at the nadir session (mm).
    new_lesions : int
        New lesions present at this session.
    rule : {'lesion', 'sum'}
        Absolute rule of progression: one lesion (RANO-BM) or the sum (RECIST 1.1).
    absolute_mm : float
        Its size (5 mm in both standards).

    Returns
    -------
    str
        'CR', 'PR', 'SD', 'PD' or 'n/a' (sum not measured, no new lesion).

    Examples
    --------
    >>> target_category(35.0, 50.0, 50.0, lesion_growth_mm=0.0, new_lesions=0)
    'PR'
    >>> target_category(36.0, 50.0, 30.0, lesion_growth_mm=6.0, new_lesions=0)
    'PD'
    """
    if new_lesions > 0:
        return "PD"
    if not (np.isfinite(sum_mm) and np.isfinite(baseline_mm) and np.isfinite(nadir_mm)):
        return "n/a"
    grown = sum_mm - nadir_mm
    absolute = lesion_growth_mm if rule == "lesion" else grown
    if grown >= PD_FRACTION * nadir_mm - _EPS and absolute >= absolute_mm - _EPS and grown > 0:
        return "PD"
    if sum_mm <= _EPS:
        return "CR"
    if sum_mm - baseline_mm <= -PR_FRACTION * baseline_mm + _EPS:
        return "PR"
    return "SD"


def volume_category(volume: float, baseline: float, nadir: float, *, new_lesions: int) -> str:
    """Research analogue of :func:`target_category` on the volume sum (sphere thresholds).

    Examples
    --------
    >>> volume_category(343.0, 1000.0, 1000.0, new_lesions=0)
    'PR'
    >>> volume_category(1728.0, 1000.0, 1000.0, new_lesions=0)
    'PD'
    """
    if new_lesions > 0:
        return "PD"
    if not (np.isfinite(volume) and np.isfinite(baseline) and np.isfinite(nadir)):
        return "n/a"
    if volume > 0 and (nadir <= 0 or 100.0 * (volume / nadir - 1.0) >= VOLUME_PD_PCT - 1e-7):
        return "PD"
    if volume <= 0:
        return "CR"
    if baseline > 0 and 100.0 * (volume / baseline - 1.0) <= VOLUME_PR_PCT + 1e-7:
        return "PR"
    return "SD"


def _pct(now: float, ref: float) -> float:
    return 100.0 * (now - ref) / ref if np.isfinite(ref) and ref > 0 else np.nan


def _baseline_index(days: np.ndarray, first_event: float) -> int:
    """Last session on or before the first event (an event day's imaging precedes it)."""
    before = np.flatnonzero(days <= first_event) if np.isfinite(first_event) else []
    return int(before[-1]) if len(before) else 0


def _holder(by_lesion: pd.DataFrame, lesion: int) -> int:
    """The lesion that carries ``lesion`` at a session: itself, or the one it merged into."""
    if lesion not in by_lesion.index or str(by_lesion.at[lesion, "status"]) != "merged":
        return lesion
    into = pd.to_numeric(by_lesion.at[lesion, "merged_into"], errors="coerce") \
        if "merged_into" in by_lesion.columns else np.nan
    return int(into) if np.isfinite(into) else lesion


def _slots(rows: pd.DataFrame, targets: list[int]) -> tuple[np.ndarray, np.ndarray]:
    """Diameter and volume carried by each target at one session (``nan``: not measured).

    A target merged into another lesion is carried by that lesion, measured once: in the slot
    of the holder when the holder is itself a target, else in the first slot pointing to it.
    """
    by_lesion = rows.set_index("lesion")
    holders = [_holder(by_lesion, lesion) for lesion in targets]
    diameter, volume = np.full(len(targets), np.nan), np.full(len(targets), np.nan)
    for i, holder in enumerate(holders):
        sharing = [j for j, h in enumerate(holders) if h == holder]
        owner = targets.index(holder) if holder in targets and \
            targets.index(holder) in sharing else sharing[0]
        if owner != i:
            diameter[i] = volume[i] = 0.0
        elif holder in by_lesion.index:
            vol = float(pd.to_numeric(by_lesion.at[holder, "volume_mm3"], errors="coerce"))
            if vol >= 0:
                diameter[i] = float(by_lesion.at[holder, "diameter_mm"]) if vol > 0 else 0.0
                volume[i] = vol
    return diameter, volume


def _subject_rows(measures: pd.DataFrame, first_event: float,
                  settings: ResponseSettings) -> list[dict]:
    sessions = (measures[["session", "day"]].drop_duplicates("session")
                .sort_values(["day", "session"], kind="stable"))
    days = sessions["day"].to_numpy(float)
    base = _baseline_index(days, first_event)
    by_session = dict(tuple(measures.groupby("session", sort=False)))
    at_base = by_session[sessions["session"].iloc[base]]
    present = at_base[at_base["measurable"] & (pd.to_numeric(at_base["volume_mm3"],
                                                               errors="coerce") > 0)]
    ranked = present.sort_values(["diameter_mm", "lesion"], ascending=[False, True])
    targets = [int(x) for x in ranked["lesion"].head(settings.max_targets)]
    seen_before = set(pd.to_numeric(measures.loc[measures["day"] <= days[base], "lesion"]))
    out, history = [], []
    for i, (session, day) in enumerate(zip(sessions["session"], days)):
        rows = by_session[session]
        diameter, volume = _slots(rows, targets)
        new = rows[~rows["lesion"].isin(seen_before)
                   & (pd.to_numeric(rows["volume_mm3"], errors="coerce") > 0)]
        history.append((session, diameter, volume))
        out.append(_row(i, base, history, len(new), targets, settings)
                   | {"session": session, "day": day})
    return out


def _row(i: int, base: int, history: list, new: int, targets: list[int],
         settings: ResponseSettings) -> dict:
    """One response row from the slot values of the sessions up to this one."""
    session, diameter, volume = history[i]
    total, vtotal = float(np.sum(diameter)), float(np.sum(volume))
    row = {"n_target": len(targets), "sum_diameters_mm": total if targets else np.nan,
           "sum_volume_mm3": vtotal if targets else np.nan, "new_lesions": 0,
           "targets": " ".join(map(str, targets)), "absolute_rule": settings.absolute_rule,
           "scope": SCOPE}
    if i < base:
        return row | {"category": "n/a", "volume_category": "n/a"}
    _, b_d, b_v = history[base]
    prior = [(h[0], np.sum(h[1]), np.sum(h[2]), h[1]) for h in history[base:i]
             if np.isfinite(np.sum(h[1]))]
    if i == base or not prior:
        return row | {"category": "baseline" if i == base else "n/a",
                      "volume_category": "baseline" if i == base else "n/a",
                      "baseline_sum_mm": float(np.sum(b_d)), "change_baseline_mm": 0.0,
                      "change_baseline_pct": 0.0, "volume_change_baseline_pct": 0.0}
    low = min(p[1] for p in prior)
    nadir = [p for p in prior if p[1] == low][-1]          # latest of equal minima
    v_nadir = min(p[2] for p in prior)
    change = diameter - nadir[3]
    growth = float(np.max(change)) if targets and np.isfinite(change).all() else np.nan
    base_sum, base_vol = float(np.sum(b_d)), float(np.sum(b_v))
    return row | {
        "new_lesions": new, "baseline_sum_mm": base_sum, "nadir_sum_mm": float(low),
        "nadir_session": nadir[0], "change_baseline_mm": total - base_sum,
        "change_nadir_mm": total - low, "change_baseline_pct": _pct(total, base_sum),
        "change_nadir_pct": _pct(total, low), "max_lesion_growth_mm": growth,
        "volume_change_baseline_pct": _pct(vtotal, base_vol),
        "volume_change_nadir_pct": _pct(vtotal, v_nadir),
        "category": target_category(total if targets else np.nan, base_sum, low,
                                    lesion_growth_mm=growth, new_lesions=new,
                                    rule=settings.absolute_rule,
                                    absolute_mm=settings.absolute_mm),
        "volume_category": volume_category(vtotal if targets else np.nan, base_vol, v_nadir,
                                           new_lesions=new)}


def assess_response(measures: pd.DataFrame, events: pd.DataFrame | None = None, *,
                    settings: ResponseSettings = ResponseSettings()) -> pd.DataFrame:
    """``response.tsv``: one row per subject and session (target-lesion component only).

    Parameters
    ----------
    measures : pandas.DataFrame
        :func:`lesion_measures` output.
    events : pandas.DataFrame, optional
        subject, day (the first event of each subject sets the baseline).
    settings : ResponseSettings
        ``max_targets``, ``absolute_rule``, ``absolute_mm``.

    Returns
    -------
    pandas.DataFrame
        Columns of :data:`COLUMNS`.

    Examples
    --------
    >>> m = pd.DataFrame({"subject": "01", "lesion": 1, "session": ["a", "b", "c"],
    ...                   "day": [0.0, 60, 120], "volume_mm3": [4000.0, 1000, 5000],
    ...                   "status": "present", "diameter_mm": [20.0, 12, 26],
    ...                   "measurable": True})
    >>> assess_response(m)[["session", "category", "change_nadir_pct"]].values.tolist()
    [['a', 'baseline', nan], ['b', 'PR', -40.0], ['c', 'PD', 116.66666666666667]]
    """
    first = {} if events is None or len(events) == 0 else \
        pd.to_numeric(events["day"]).groupby(events["subject"].astype(str)).min().to_dict()
    rows = []
    data = measures.astype({"subject": str, "session": str})
    for subject, part in data.groupby("subject", sort=True):
        rows += [{"subject": subject} | r for r in
                 _subject_rows(part, float(first.get(subject, np.nan)), settings)]
    return pd.DataFrame(rows, columns=list(COLUMNS)) if rows else \
        pd.DataFrame(columns=list(COLUMNS))


def _best(categories: list[str]) -> str:
    chosen = []
    for c in categories:
        if c in _RANK:
            chosen.append(c)
            if c == "PD":
                break
    return min(chosen, key=_RANK.get) if chosen else "n/a"


def summarize_response(response: pd.DataFrame) -> pd.DataFrame:
    """Per subject: best response, first progression, duration of response.

    Examples
    --------
    >>> r = pd.DataFrame({"subject": "01", "session": list("abcd"), "day": [0., 50, 100, 150],
    ...                   "n_target": 1, "category": ["baseline", "PR", "SD", "PD"],
    ...                   "volume_category": ["baseline", "SD", "SD", "SD"],
    ...                   "change_baseline_pct": [0., -40, -20, 10]})
    >>> s = summarize_response(r).iloc[0]
    >>> s.best_response, float(s.first_progression_day), float(s.response_duration_days)
    ('PR', 150.0, 100.0)
    """
    rows = []
    for subject, part in response.groupby("subject", sort=True):
        cats, days = part["category"].tolist(), part["day"].to_numpy(float)
        pd_days = [d for c, d in zip(cats, days) if c == "PD"]
        responded = [d for c, d in zip(cats, days) if c in ("CR", "PR")]
        start = responded[0] if responded else np.nan
        after = [d for d in pd_days if np.isfinite(start) and d > start]
        end = after[0] if after else (days[-1] if np.isfinite(start) else np.nan)
        base = part[part["category"] == "baseline"]
        rows.append({"subject": subject,
                     "baseline_session": base["session"].iloc[0] if len(base) else "",
                     "n_target": int(part["n_target"].iloc[0]), "best_response": _best(cats),
                     "best_change_baseline_pct": pd.to_numeric(
                         part.loc[part["category"].isin(list(_RANK)), "change_baseline_pct"]
                     ).min(),
                     "first_progression_day": pd_days[0] if pd_days else np.nan,
                     "response_start_day": start, "response_duration_days": end - start,
                     "response_ongoing": bool(responded) and not after,
                     "best_volume_category": _best(part["volume_category"].tolist()),
                     "scope": SCOPE})
    return pd.DataFrame(rows, columns=list(SUMMARY_COLUMNS))
