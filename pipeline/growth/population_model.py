"""The population model's per-law machinery: a cohort's series as arrays, the fit of one law
over one group and phase (:func:`fit_cohort`, estimated by ``population_core``), each lesion's
posterior covariance and forecasts. :mod:`pipeline.growth.population` builds the tables from it,
and the backtest refits with it (docs/methods.md, "Population model")."""
from __future__ import annotations

import numpy as np
import pandas as pd
from scipy import stats

from pipeline.growth.solvers import jacobian
from pipeline.growth.laws import Law
from pipeline.growth.population_core import Cohort, PopulationFit, fit_population
from pipeline.settings import FitSettings


#: Columns that name one lesion phase.
KEYS = ["group", "phase", "subject", "lesion"]
#: Posterior draws per lesion for forecasts.
_DRAWS = 4000


def lesion_series(phased: pd.DataFrame) -> pd.DataFrame:
    """The fitted sessions of every lesion phase with at least 2 of them, sorted.

    Parameters
    ----------
    phased : pandas.DataFrame
        Output of :func:`pipeline.phases.assign_phases` (``group`` optional).

    Returns
    -------
    pandas.DataFrame
        group ('all' when empty), phase, subject, lesion, day, log_v, n_points.

    Examples
    --------
    >>> phased = pd.DataFrame({"subject": "01", "lesion": [1, 1, 2], "phase": "untreated",
    ...                        "day": [0.0, 30, 0], "volume_mm3": [10.0, 20, 5], "in_fit": True})
    >>> lesion_series(phased)[["lesion", "n_points"]].values.tolist()
    [[1, 2], [1, 2]]
    """
    volume = pd.to_numeric(phased["volume_mm3"], errors="coerce")
    keep = phased["in_fit"].astype(bool) & (volume > 0) & np.isfinite(volume)
    rows = phased.loc[keep, ["subject", "lesion", "phase", "day"]].copy()
    group = phased.loc[keep, "group"] if "group" in phased else pd.Series("", rows.index)
    rows["group"] = group.fillna("").astype(str).str.strip().replace("", "all")
    rows["subject"] = rows["subject"].astype(str)
    rows["phase"] = rows["phase"].astype(str)
    rows["day"] = pd.to_numeric(rows["day"], errors="coerce").astype(float)
    rows["log_v"] = np.log(volume[keep].astype(float))
    rows = rows.sort_values(KEYS + ["day"], kind="stable")
    rows["n_points"] = rows.groupby(KEYS, sort=False)["day"].transform("size")
    return rows[rows["n_points"] >= 2].reset_index(drop=True)[KEYS + ["day", "log_v",
                                                                       "n_points"]]


def _arrays(rows: pd.DataFrame) -> dict:
    """Padded arrays of one (group, phase)."""
    key = rows.groupby(["subject", "lesion"], sort=False).ngroup().to_numpy()
    pos = rows.groupby(["subject", "lesion"], sort=False).cumcount().to_numpy()
    m, n = key.max() + 1, pos.max() + 1
    day, y, w = np.zeros((m, n)), np.zeros((m, n)), np.zeros((m, n))
    day[key, pos], y[key, pos], w[key, pos] = rows["day"], rows["log_v"], 1.0
    first = day[:, 0].copy()
    t = np.where(w > 0, day - first[:, None], 0.0)
    ids = rows.drop_duplicates(["subject", "lesion"])
    cluster = pd.factorize(ids["subject"])[0]
    return {"t": t, "y": y, "w": w, "cluster": cluster, "day_start": first,
            "day_end": first + t.max(1), "ids": ids[["subject", "lesion"]].reset_index(drop=True)}


def _starts(law: Law, a: dict) -> np.ndarray:
    """Per-lesion start values from the weighted log-linear regression."""
    t, y, w = a["t"], a["y"], a["w"]
    nw = w.sum(1)
    tm, ym = (w * t).sum(1) / nw, (w * y).sum(1) / nw
    var = (w * (t - tm[:, None]) ** 2).sum(1)
    slope = np.where(var > 0, (w * (t - tm[:, None]) * (y - ym[:, None])).sum(1)
                     / np.where(var > 0, var, 1.0), 0.0)
    intercept = ym - slope * tm
    y_high = np.where(w > 0, y, -np.inf).max(1)
    starts = law.starts(intercept, slope, t.max(1), y_high)
    return starts[1] if len(starts) > 1 else starts[0]


def fit_cohort(law: Law, a: dict, *, settings: FitSettings = FitSettings(),
               covariance: str = "diagonal") -> tuple[PopulationFit, Cohort]:
    """Population fit of one law to the arrays of one (group, phase) (see :func:`_arrays`)."""
    y_obs = np.where(a["w"] > 0, a["y"], np.nan)
    lower, upper = law.bounds(np.nanmin(y_obs, 1), np.nanmax(y_obs, 1), settings)
    cohort = Cohort(a["t"], a["y"], a["w"], a["cluster"], lower, upper)
    fit = fit_population(law, cohort, _starts(law, a), diagonal=covariance == "diagonal")
    return fit, cohort


def _mu_cov(fit: PopulationFit) -> np.ndarray:
    """Robust covariance of mu (model-based when not available), made positive semi-definite."""
    cov = fit.mu_cov if np.isfinite(fit.mu_cov).all() else fit.mu_cov_model
    if not np.isfinite(cov).all():
        return np.full_like(cov, np.nan)
    value, vector = np.linalg.eigh(0.5 * (cov + cov.T))
    return (vector * np.maximum(value, 0.0)) @ vector.T


def individual_cov(fit: PopulationFit) -> np.ndarray:
    """Conditional covariances widened by the uncertainty of mu: C + G V_mu G'."""
    G = fit.cond_cov @ np.linalg.inv(fit.omega)
    extra = G @ np.nan_to_num(_mu_cov(fit)) @ np.swapaxes(G, 1, 2)
    return fit.cond_cov + 0.5 * (extra + np.swapaxes(extra, 1, 2))


def predict(law: Law, fit: PopulationFit, cov: np.ndarray, t_new: np.ndarray, *,
            confidence: float, seed: int = 0) -> tuple[np.ndarray, np.ndarray, np.ndarray,
                                                       np.ndarray]:
    """ln V at ``t_new`` (M,) per lesion: (centre, low, high, share of draws that blow up).

    Delta method with the residual variance where the individual curve is defined at ``t_new``;
    posterior predictive draws elsewhere (see module docstring).
    """
    z = stats.norm.ppf(0.5 * (1.0 + confidence))
    tn = np.asarray(t_new, float)[:, None]
    with np.errstate(all="ignore"):
        centre = law.log_volume(tn, fit.modes)[:, 0]
        g = jacobian(law.log_volume, tn, fit.modes)[:, 0, :]
    var = np.einsum("mp,mpq,mq->m", g, cov, g) + fit.sigma ** 2
    half = z * np.sqrt(var)
    low, high, blown = centre - half, centre + half, np.zeros(len(centre))
    bad = np.flatnonzero(~np.isfinite(centre))
    if len(bad):
        rng = np.random.default_rng(seed)
        chol = np.linalg.cholesky(cov[bad] + 1e-12 * np.eye(cov.shape[-1]))
        draws = fit.modes[bad, None, :] + np.einsum(
            "mpq,mdq->mdp", chol, rng.standard_normal((len(bad), _DRAWS, cov.shape[-1])))
        with np.errstate(all="ignore"):
            lv = law.log_volume(np.repeat(tn[bad], _DRAWS, 0).reshape(len(bad), _DRAWS, 1),
                                draws)[..., 0]
        blow = ~np.isfinite(lv) & (draws[..., 2] > 1.0) if law.name == "power" else \
            np.zeros(lv.shape, bool)                   # only a power law with beta > 1 blows up
        lv = np.where(blow, np.inf, np.where(np.isfinite(lv), lv, -np.inf))
        lv = lv + fit.sigma * rng.standard_normal(lv.shape)
        tail = 0.5 * (1.0 - confidence)
        q = np.quantile(lv, [tail, 0.5, 1.0 - tail], axis=1, method="inverted_cdf")
        low[bad], centre[bad], high[bad] = q[0], q[1], q[2]
        blown[bad] = blow.mean(1)
    return centre, low, high, blown


