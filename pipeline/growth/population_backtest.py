"""Backtest: predict every lesion phase's last session from the sessions before it.

For every lesion phase with at least 3 fitted sessions the last session is held out; each law is
fitted again without it, (a) to the lesion alone (the per-lesion least-squares fit of
:func:`pipeline.growth.fit_series`, with its delta-method prediction interval) and (b) by the
population model of its (group, phase) (every other lesion phase of the cohort keeps its sessions;
lesion phases with 3 or more sessions lose their last one). The held-out ln volume is compared
with the prediction: median absolute ln error and the share inside the prediction interval, per
group and over all groups (``all``), by method and law.

Helper of :mod:`pipeline.population` (which documents the model). Benzekry et al. (PLoS Comput
Biol 2014;10:e1003800) found individual fits predict poorly from few sessions; a population prior
helps (Vaghi C et al. PLoS Comput Biol 2020;16:e1007178).
"""
from __future__ import annotations

import numpy as np
import pandas as pd

from pipeline.growth import lesion_fits as growth
from pipeline.growth.laws import LAWS, Law
from pipeline.settings import FitSettings, PopulationSettings

__all__ = ["backtest", "held_out_predictions"]


def _split(series: pd.DataFrame) -> tuple[pd.DataFrame, pd.DataFrame]:
    """(training rows, held-out rows): the last session of every lesion phase with >= 3."""
    keys = ["group", "phase", "subject", "lesion"]
    last = series.groupby(keys, sort=False).cumcount(ascending=False) == 0
    held = last & (series["n_points"] >= 3)
    train = series[~held].copy()
    train["n_points"] = train.groupby(keys, sort=False)["day"].transform("size")
    return train.reset_index(drop=True), series[held].reset_index(drop=True)


def _individual(law: Law, train: pd.DataFrame, held: pd.DataFrame, settings: FitSettings
                ) -> pd.DataFrame:
    """Per-lesion fit without the held-out session; prediction at its day."""
    keys = ["group", "phase", "subject", "lesion"]
    rows = train.merge(held[keys], on=keys, how="inner")
    target = held.set_index(keys)
    parts = []
    for n, sub in rows.groupby("n_points", sort=True):
        if n < law.n_params:
            continue
        day = sub["day"].to_numpy(float).reshape(-1, n)
        y = sub["log_v"].to_numpy(float).reshape(-1, n)
        t = day - day[:, :1]
        ids = sub[keys].iloc[::n].reset_index(drop=True)
        hold = target.loc[pd.MultiIndex.from_frame(ids)]
        horizon = hold["day"].to_numpy(float) - day[:, -1]
        theta = growth.fit_series(law, t, y, settings=settings)["theta"]
        rss = ((y - law.log_volume(t, theta)) ** 2).sum(1)
        df = n - law.n_params
        sigma = settings.measurement_error
        scale = np.full(len(t), sigma) if sigma > 0 else (
            np.sqrt(rss / df) if df > 0 else np.full(len(t), np.nan))
        pred = growth._forecast(law, t, theta, df, scale, horizon, settings, sigma > 0)
        parts.append(ids.assign(observed=hold["log_v"].to_numpy(),
                                centre=np.log(pred["forecast_mm3"]),
                                low=np.log(pred["forecast_low_mm3"]),
                                high=np.log(pred["forecast_high_mm3"])))
    return pd.concat(parts, ignore_index=True) if parts else pd.DataFrame()


def _population(law: Law, train: pd.DataFrame, held: pd.DataFrame, settings: FitSettings,
                population: PopulationSettings) -> pd.DataFrame:
    from pipeline.growth.population_model import _arrays, fit_cohort, individual_cov, predict

    parts = []
    for (group, phase), rows in train.groupby(["group", "phase"], sort=True):
        mine = held[(held["group"] == group) & (held["phase"] == phase)]
        if not len(mine):
            continue
        a = _arrays(rows)
        try:
            fit, _ = fit_cohort(law, a, settings=settings, covariance=population.covariance)
        except (ValueError, FloatingPointError, np.linalg.LinAlgError):
            continue                      # the law failed on this cohort: no prediction
        index = a["ids"].reset_index().merge(mine, on=["subject", "lesion"], how="inner")
        pick = index["index"].to_numpy()
        t_new = np.zeros(len(a["t"]))
        t_new[pick] = index["day"].to_numpy(float) - a["day_start"][pick]
        centre, low, high, _ = predict(law, fit, individual_cov(fit), t_new,
                                       confidence=settings.confidence, seed=settings.seed)
        parts.append(index.assign(centre=centre[pick], low=low[pick], high=high[pick])
                     .rename(columns={"log_v": "observed"}))
    return pd.concat(parts, ignore_index=True) if parts else pd.DataFrame()


def held_out_predictions(series: pd.DataFrame, *, settings: FitSettings = FitSettings(),
                         population: PopulationSettings = PopulationSettings()) -> pd.DataFrame:
    """One row per (held-out lesion phase, method, law): observed and predicted ln volume."""
    train, held = _split(series)
    parts = []
    for name in population.models:
        law = LAWS[name]
        for method, part in (("individual", _individual(law, train, held, settings)),
                             ("population", _population(law, train, held, settings,
                                                        population))):
            if len(part):
                parts.append(part.assign(method=method, model=name))
    return pd.concat(parts, ignore_index=True) if parts else pd.DataFrame()


def backtest(series: pd.DataFrame, *, settings: FitSettings = FitSettings(),
             population: PopulationSettings = PopulationSettings()) -> list[dict]:
    """``backtest.tsv`` rows from :func:`pipeline.population.lesion_series` output.

    Examples
    --------
    >>> from pipeline.growth.population_model import lesion_series
    >>> rows = [{"subject": f"s{i}", "lesion": 1, "phase": "untreated", "day": d,
    ...          "volume_mm3": 50 * np.exp(0.01 * d + 0.02 * ((i * 7 + d) % 3 - 1)),
    ...          "in_fit": True} for i in range(12) for d in (0.0, 50, 100)]
    >>> out = backtest(lesion_series(pd.DataFrame(rows)),
    ...                population=PopulationSettings(models=("exponential",)))
    >>> [(r["group"], r["method"], r["n_lesions"]) for r in out]
    [('all', 'individual', 12), ('all', 'population', 12)]
    """
    pred = held_out_predictions(series, settings=settings, population=population)
    if not len(pred):
        return []
    pred["error"] = np.abs(pred["observed"] - pred["centre"])
    pred["inside"] = (pred["observed"] >= pred["low"]) & (pred["observed"] <= pred["high"])
    groups = sorted(pred["group"].unique())
    chosen = [("all", pred)] + ([(g, pred[pred["group"] == g]) for g in groups]
                                if groups != ["all"] else [])
    rows = []
    for label, part in chosen:
        for (method, model), sub in part.groupby(["method", "model"], sort=True):
            rows.append({"group": label, "method": method, "model": model,
                         "n_lesions": len(sub), "median_abs_log_error": sub["error"].median(),
                         "coverage": sub["inside"].mean()})
    return rows
