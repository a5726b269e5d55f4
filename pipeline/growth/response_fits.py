"""Response laws fitted over each whole post-event phase, shrinkage included (``fits.tsv`` rows).

The regrowth fits of a post-event phase start at its nadir (``FitSettings.from_nadir``); the laws
of ``FitSettings.response_models`` (:mod:`pipeline.growth.response_laws`) are fitted to the same
phase
from its first session, the response included. Their rows carry ``window`` = ``phase`` (the
regrowth rows ``from-nadir``; untreated and ``from_nadir = false`` rows ``phase``), their own
Akaike weights and ``best`` = false: AICc compares laws on the same sessions only, so they are
never ranked against the regrowth rows. Sessions of the phase where the lesion was not seen
(absent, or below ``detection_limit_mm3``) enter these fits as left-censored observations
(:mod:`pipeline.growth.censored`), and the row reports the first such day (``first_absent_day``).
Research use only (``pipeline.DISCLAIMER``).
"""
from __future__ import annotations

from dataclasses import replace

import numpy as np
import pandas as pd

from pipeline.settings import FitSettings

__all__ = ["fit_whole_phases", "add_windows"]

_UNSEEN = ("absent", "below-detection")


def fit_whole_phases(phased: pd.DataFrame, *, settings: FitSettings = FitSettings()
                     ) -> pd.DataFrame:
    """``response_models`` fitted to every post-event (subject, lesion, phase) as a whole.

    Parameters
    ----------
    phased : pandas.DataFrame
        :func:`pipeline.growth.phases.assign_phases` output.
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
    >>> from pipeline.growth.phases import assign_phases
    >>> rows = fit_whole_phases(assign_phases(lon, ev))
    >>> rows[["model", "n_points", "window"]].values.tolist()
    [['bertalanffy_loss', 5, 'whole-phase'], ['regression_regrowth', 5, 'whole-phase']]
    """
    from pipeline.growth.lesion_fits import fit_lesions

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
    censored = _censored_rows(widened, names, _log_limit(phased, settings), settings)
    if len(censored):
        keys = ["subject", "lesion", "phase"]
        done = pd.MultiIndex.from_frame(censored[keys].drop_duplicates())
        rows = rows[~pd.MultiIndex.from_frame(rows[keys]).isin(done)]
        rows = pd.concat([rows, censored], ignore_index=True)
    rows["window"] = "whole-phase"
    rows["best"] = False
    rows["note"] = [_prefix(note) for note in rows["note"]]
    return rows.reset_index(drop=True)


def _log_limit(phased: pd.DataFrame, settings: FitSettings) -> tuple[float, str]:
    """ln of the detection limit and how it was chosen."""
    if settings.detection_limit_mm3 > 0:
        return float(np.log(settings.detection_limit_mm3)), "detection_limit_mm3"
    volume = pd.to_numeric(phased["volume_mm3"], errors="coerce")
    smallest = volume[volume > 0].min()
    return float(np.log(smallest)) if np.isfinite(smallest) else np.nan, "smallest volume seen"


def _censored_rows(widened: pd.DataFrame, names: tuple[str, ...], limit: tuple[float, str],
                   settings: FitSettings) -> pd.DataFrame:
    """Whole-phase rows of the series with unseen sessions, fitted with them left-censored."""
    from pipeline.growth.censored import fit_censored
    from pipeline.growth.laws import LAWS

    log_limit, how = limit
    usable = widened[widened["in_fit"].astype(bool)
                     | widened["fit_exclusion"].astype(str).isin(_UNSEEN)]
    out = []
    if not np.isfinite(log_limit):
        return pd.DataFrame()
    for (subject, lesion, phase), part in usable.groupby(["subject", "lesion", "phase"]):
        part = part.sort_values("day")
        unseen = part["fit_exclusion"].astype(str).isin(_UNSEEN).to_numpy()
        if not unseen.any() or (~unseen).sum() < 2:
            continue
        day = part["day"].to_numpy(float)
        with np.errstate(divide="ignore"):
            y = np.where(unseen, log_limit, np.log(part["volume_mm3"].to_numpy(float)))
        days = ", ".join(f"{d:g}" for d in day[unseen])
        for name in names:
            law = LAWS[name]
            if len(day) <= law.n_params:
                continue
            fit = fit_censored(law, day - day[0], y, unseen, log_limit, settings=settings)
            out.append(_censored_row(law, fit, day, unseen) | {
                "subject": subject, "lesion": lesion, "phase": phase,
                "group": part["group"].iloc[0] if "group" in part else "all",
                "note": f"left-censored: {unseen.sum()} session(s) not seen (days {days}) "
                        f"entered as below {np.exp(log_limit):g} mm^3 ({how})"})
    table = pd.DataFrame(out)
    if len(table):                    # Akaike weights among the censored fits of one series
        key = [table[k] for k in ("subject", "lesion", "phase")]
        delta = table["aicc"] - table.groupby(key)["aicc"].transform("min")
        weight = np.exp(-0.5 * delta)
        table["akaike_weight"] = weight / weight.groupby(key).transform("sum")
    return table


def _censored_row(law, fit: dict, day: np.ndarray, unseen: np.ndarray) -> dict:
    theta = np.asarray(fit["theta"], float)[None, :]
    row = {"model": law.name, "n_points": len(day), "day_start": day[0], "day_end": day[-1],
           "v0_mm3": float(np.exp(theta[0, 0])), "k_per_day": float(law.initial_rate(theta)[0]),
           "aicc": fit["aicc"], "sigma_log": fit["sigma"], "df_resid": len(day) - law.n_params,
           "status": "ok" if fit["ok"] else "failed", "first_absent_day": day[unseen][0]}
    if law.derived is not None:
        row |= {k: float(v[0]) for k, v in law.derived(theta).items()}
    if "nadir_day_rel" in row:
        row["nadir_day"] = day[0] + row.pop("nadir_day_rel")
    return row


def _prefix(note: object) -> str:
    """The whole-phase note; the ranking notes of the fits are dropped (best is false here)."""
    head = "whole post-event phase, shrinkage included (not ranked against the regrowth rows)"
    text = "" if note is None or (isinstance(note, float) and np.isnan(note)) else str(note)
    kept = [p for p in text.split("; ") if p and not p.startswith("best by fewest parameters")]
    return "; ".join([head] + kept)


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
