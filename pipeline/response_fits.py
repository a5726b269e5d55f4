"""Response laws fitted over each whole post-event phase, shrinkage included (``fits.tsv`` rows).

The regrowth fits of a post-event phase start at its nadir (``FitSettings.from_nadir``); the laws
of ``FitSettings.response_models`` (:mod:`pipeline.response_laws`) are fitted to the same phase
from its first session, the response included. Their rows carry ``window`` = ``phase`` (the
regrowth rows ``from-nadir``; untreated and ``from_nadir = false`` rows ``phase``), their own
Akaike weights and ``best`` = false: AICc compares laws on the same sessions only, so they are
never ranked against the regrowth rows. Research use only (``pipeline.DISCLAIMER``).
"""
from __future__ import annotations

from dataclasses import replace

import numpy as np
import pandas as pd

from pipeline.settings import FitSettings

__all__ = ["fit_whole_phases", "add_windows", "WINDOW_COLUMNS"]

WINDOW_COLUMNS: dict[str, dict] = {
    "window": {"Description": "Sessions the law was fitted to", "Units": "n/a", "Levels": {
        "phase": "every usable session of the phase",
        "from-nadir": "a post-event phase from its nadir on (regrowth; from_nadir)",
        "whole-phase": "a post-event phase from its first session, response included "
                       "(response_models; not ranked against the regrowth rows)"}},
    "decay_per_day": {"Description": "Regression-regrowth decay rate d", "Units": "1/day"},
    "regrowth_per_day": {"Description": "Regression-regrowth regrowth rate g", "Units": "1/day"},
    "nadir_day": {"Description": "Day of the fitted curve's minimum (day_start + "
                  "ln(d/g)/(d+g) when d > g; day_start when d <= g; n/a when g = 0 < d)",
                  "Units": "day"},
    "nadir_mm3": {"Description": "Fitted volume at nadir_day", "Units": "mm^3"},
    "depth_of_response": {"Description": "nadir_mm3 / v0_mm3 (fitted volume at the phase's "
                          "first session)", "Units": "n/a"},
    "loss_per_day": {"Description": "Loss rate c of dV/dt = a V^b - c V", "Units": "1/day"},
}


def fit_whole_phases(phased: pd.DataFrame, *, settings: FitSettings = FitSettings()
                     ) -> pd.DataFrame:
    """``response_models`` fitted to every post-event (subject, lesion, phase) as a whole.

    Parameters
    ----------
    phased : pandas.DataFrame
        :func:`pipeline.phases.assign_phases` output.
    settings : FitSettings

    Returns
    -------
    pandas.DataFrame
        ``fits.tsv`` rows (``window`` = ``whole-phase``, ``best`` false); none when no law or
        no post-event phase; (lesion, phase)s too short for every law give no row.

    Examples
    --------
    >>> days = [0.0, 50, 100, 130, 160, 190, 240, 290]
    >>> v = [900.0, 1000, 1100, 700, 520, 480, 560, 700]
    >>> lon = pd.DataFrame({"subject": "01", "lesion": 1, "day": days, "volume_mm3": v,
    ...                     "status": "present"})
    >>> ev = pd.DataFrame({"subject": ["01"], "day": [100.0], "event": ["radiosurgery"]})
    >>> from pipeline.phases import assign_phases
    >>> rows = fit_whole_phases(assign_phases(lon, ev))
    >>> rows[["model", "n_points", "window"]].values.tolist()
    [['bertalanffy_loss', 5, 'whole-phase'], ['regression_regrowth', 5, 'whole-phase']]
    """
    from pipeline.growth import fit_lesions

    names = tuple(settings.response_models)
    post = phased[phased["phase"].astype(str) != "untreated"]
    if not names or len(post) == 0:
        return pd.DataFrame()
    widened = post.copy()
    nadir = widened["fit_exclusion"].astype(str) == "before-nadir"
    widened.loc[nadir, "fit_exclusion"] = ""
    widened["in_fit"] = widened["in_fit"].astype(bool) | nadir
    rows = fit_lesions(widened, settings=replace(settings, models=names))
    rows = rows[rows["model"] != "none"].copy()
    rows["window"] = "whole-phase"
    rows["best"] = False
    rows["note"] = [_prefix(note) for note in rows["note"]]
    return rows.reset_index(drop=True)


def _prefix(note: object) -> str:
    head = "whole post-event phase, shrinkage included (not ranked against the regrowth rows)"
    text = "" if note is None or (isinstance(note, float) and np.isnan(note)) else str(note)
    return head + ("; " + text if text else "")


def add_windows(fits: pd.DataFrame, phased: pd.DataFrame, *,
                settings: FitSettings = FitSettings()) -> pd.DataFrame:
    """``fits`` (regular rows) with ``window`` set, followed by the whole-phase rows.

    Examples
    --------
    >>> fits = pd.DataFrame({"phase": ["untreated", "after-x"], "model": "power"})
    >>> add_windows(fits, pd.DataFrame({"phase": []}))["window"].tolist()
    ['phase', 'from-nadir']
    """
    out = fits.copy()
    post = out["phase"].astype(str) != "untreated"
    out["window"] = np.where(post & settings.from_nadir, "from-nadir", "phase")
    whole = fit_whole_phases(phased, settings=settings) if len(phased) else pd.DataFrame()
    if len(whole) == 0:
        return out
    columns = list(out.columns) + [c for c in whole.columns if c not in out.columns]
    merged = pd.concat([out, whole], ignore_index=True).reindex(columns=columns)
    return merged.sort_values(["subject", "lesion", "phase", "window", "model"],
                              kind="stable").reset_index(drop=True)
