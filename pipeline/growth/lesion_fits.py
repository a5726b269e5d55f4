"""Stage 3: fit growth laws to every lesion and phase (``fits.tsv`` rows).

One row per (subject, lesion, phase, model). Fits minimise squared log-volume residuals
(multiplicative error; docs/methods.md §1.4) with bounded parameters and several starts; the power
law
dV/dt = alpha V^beta is fitted as (V0, k = alpha V0^(beta-1), beta), which keeps beta free of
the volume unit and stable through beta = 1 (:mod:`pipeline.growth.laws`).

- A law with more parameters than the phase has fitted sessions gets no row; the best row of the
  lesion and phase says so in ``note``. A (lesion, phase) where no law can be fitted gets one row
  with model ``none`` and status ``not-fitted`` saying why.
- Exactly as many sessions as parameters: the exact solution (power law: the 3-point power-mean
  solution), status ``exact``, no residual degrees of freedom, no interval unless a measurement
  error is configured (``FitSettings.measurement_error``); ``no-exact-solution`` when none exists
  (then the bounded least-squares curve is reported).
- The beta interval is the profile-likelihood interval (Venzon and Moolgavkar 1988; Bates and
  Watts 1988): {b : (RSS(b) - RSS_min) / s^2 <= F(1, n-p)} with s^2 = RSS_min/(n-p) when the
  error is unknown, {b : (RSS(b) - RSS_min) / sigma^2 <= chi2(1)} when it is known. A side that
  does not cross within ``beta_bounds`` is reported ``n/a`` with a note (unbounded). Optional
  parametric bootstrap (``FitSettings.bootstrap`` repeats) adds a percentile interval.
- AICc (Hurvich and Tsai 1989) with sigma estimated (k = p + 1) or known (k = p); Akaike weights
  (Burnham and Anderson 2002) over the laws of a lesion and phase; ``best`` = lowest AICc, or,
  when AICc is undefined for every law (few sessions), the law with fewest parameters. A law
  that fits exactly although it has residual dof (zero residual: AICc tends to -infinity) is
  preferred to every law with a positive residual (fewest parameters among such laws; AICc and
  Akaike weights n/a); the best row's note says which rule chose it and names the laws that had
  no AICc to compare. A series with the same volume at every session has beta n/a (any fits).
- A failed fit is a row with status ``failed`` and the reason in ``note``; it never stops a batch.

Derived figures: ``doubling_time_days`` = days for the fitted curve to double from the fitted
volume at the last fitted session (power law: DT(V) = V^(1-b)(2^(1-b) - 1)/(alpha(1-b)),
docs/methods.md §1.1); ``sgr_per_day`` = ln(V_end/V_start)/(t_end - t_start) on the fitted curve
(specific growth rate, Mehrara et al. Cancer Res 2007;67:3970-3975; DT = ln2/SGR for exponential
growth); ``forecast_mm3`` at ``forecast_day`` = last fitted day + ``forecast_days`` with a
prediction interval (delta method plus the measurement error, t or normal quantile); a forecast
that overflows is n/a with a note, one above ``growth_notes.IMPLAUSIBLE_MM3`` is flagged.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
from scipy import stats

from pipeline.errors import UsageError
from pipeline.growth.solvers import (gompertz_grid_start, jacobian, levenberg_marquardt,
                                     linear_start, power_profile, profile_interval)
from pipeline.growth.fit_table import COLUMNS, finish_rows
from pipeline.growth.laws import LAWS, Law, power_three_point
from pipeline.settings import FitSettings

__all__ = ["fit_lesions", "fit_series", "COLUMNS"]

KEYS = ["subject", "lesion", "phase"]
_NEEDED = ("subject", "lesion", "phase", "day", "volume_mm3", "in_fit")


def _exact_or_ls(law: Law, t: np.ndarray, y: np.ndarray, theta: np.ndarray, rss: np.ndarray
                 ) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
    """Status per row for n == p: the power law's exact solution where it exists."""
    status = np.where(rss < 1e-12, "exact", "no-exact-solution").astype(object)
    if law.name == "power":
        lv0, k, beta, ok = power_three_point(t, y)
        ok &= np.all(np.diff(t, axis=1) > 0, axis=1)
        theta = np.where(ok[:, None], np.stack([lv0, k, beta], -1), theta)
        rss = np.where(ok, 0.0, rss)
        status = np.where(ok, "exact", "no-exact-solution").astype(object)
    return theta, rss, status


def _starts(law: Law, t: np.ndarray, y: np.ndarray, settings: FitSettings,
            grid_theta: np.ndarray | None) -> list[np.ndarray]:
    """The law's own starts; the power law starts from its beta-grid profile minimum instead
    (a global search over beta), the Gompertz law also from its c-grid minimum."""
    if grid_theta is not None:
        return [grid_theta]
    intercept, slope = linear_start(t, y)
    starts = law.starts(intercept, slope, t[:, -1], y.max(1))
    if law.name == "gompertz":
        starts = [gompertz_grid_start(t, y, settings.max_rate_per_day), starts[-1]]
    return starts


def _beta_grid(settings: FitSettings) -> np.ndarray:
    lo, hi = settings.beta_bounds
    grid = np.arange(lo, hi + 1e-9, settings.beta_grid_step)
    return np.unique(np.concatenate([grid, [lo, hi, 1.0]]))


def _power_interval(t: np.ndarray, y: np.ndarray, theta: np.ndarray, rss: np.ndarray,
                    grid: np.ndarray, grid_rss: np.ndarray, settings: FitSettings
                    ) -> tuple[np.ndarray, np.ndarray, str]:
    n, p = t.shape[1], 3
    sigma = settings.measurement_error
    if sigma > 0:
        threshold = rss + sigma ** 2 * stats.chi2.ppf(settings.confidence, 1)
        method = "profile-chi2"
    elif n > p:
        threshold = rss * (1.0 + stats.f.ppf(settings.confidence, 1, n - p) / (n - p))
        method = "profile-F"
    else:
        nan = np.full(len(t), np.nan)
        return nan, nan, ""
    k_max = settings.max_rate_per_day

    def profile(b: np.ndarray, rows: np.ndarray) -> np.ndarray:
        return power_profile(t[rows], y[rows], b[:, None], k_max=k_max)[0][:, 0]

    low, high = profile_interval(profile, grid, grid_rss, theta[:, 2], threshold)
    return low, high, method


def _bootstrap(law: Law, t: np.ndarray, y: np.ndarray, theta: np.ndarray, scale: np.ndarray,
               lower: np.ndarray, upper: np.ndarray, settings: FitSettings
               ) -> tuple[np.ndarray, np.ndarray]:
    """Parametric bootstrap of beta: simulate log-normal errors around the fit and refit."""
    repeats = settings.bootstrap
    rng = np.random.default_rng(settings.seed)
    m, n = t.shape
    fitted = law.log_volume(t, theta)
    y_star = (fitted[:, None, :] + scale[:, None, None] * rng.standard_normal((m, repeats, n)))
    rep = np.repeat
    th, _ = levenberg_marquardt(law.log_volume, rep(t, repeats, 0), y_star.reshape(-1, n),
                                rep(theta, repeats, 0), rep(lower, repeats, 0),
                                rep(upper, repeats, 0))
    beta = th[:, 2].reshape(m, repeats)
    tail = 50.0 * (1.0 - settings.confidence)
    low, high = np.percentile(beta, [tail, 100.0 - tail], axis=1)
    ok = np.isfinite(scale)
    return np.where(ok, low, np.nan), np.where(ok, high, np.nan)


def _at_bound(theta: np.ndarray, lower: np.ndarray, upper: np.ndarray) -> np.ndarray:
    tol = 1e-6 * (1.0 + np.abs(theta))
    hit = (np.abs(theta - lower) < tol) | (np.abs(theta - upper) < tol)
    return hit[:, 1:].any(1)                          # log_v0 bounds are only a safety net


def _forecast(law: Law, t: np.ndarray, theta: np.ndarray, df: int, scale: np.ndarray,
              horizon: float, settings: FitSettings, known: bool) -> dict[str, np.ndarray]:
    """Forecast at ``t_end + horizon`` with a prediction interval on the log scale."""
    t_end = t[:, -1]
    tf = (t_end + horizon)[:, None]
    with np.errstate(all="ignore"):
        log_f = law.log_volume(tf, theta)[:, 0]
        J = jacobian(law.log_volume, t, theta)
        cov = np.linalg.pinv(np.einsum("mnp,mnq->mpq", J, J)) * (scale ** 2)[:, None, None]
        g = jacobian(law.log_volume, tf, theta)[:, 0, :]
        var = np.einsum("mp,mpq,mq->m", g, cov, g) + scale ** 2
    level = 0.5 * (1.0 + settings.confidence)
    q = stats.norm.ppf(level) if known else (stats.t.ppf(level, df) if df > 0 else np.nan)
    with np.errstate(all="ignore"):      # overflow -> inf, made n/a with a note later
        half = q * np.sqrt(var)
        return {"forecast_mm3": np.exp(log_f), "forecast_low_mm3": np.exp(log_f - half),
                "forecast_high_mm3": np.exp(log_f + half)}


def fit_series(law: Law, t: np.ndarray, y: np.ndarray, *,
               settings: FitSettings = FitSettings()) -> dict[str, np.ndarray]:
    """Fit one law to ``M`` series of equal length at once (the array front end).

    Parameters
    ----------
    law : Law
        From :data:`pipeline.growth.laws.LAWS`.
    t : (M, n) ndarray
        Days since each series' first session (first column 0, non-decreasing).
    y : (M, n) ndarray
        Natural logs of the volumes (mm^3).

    Returns
    -------
    dict of (M,) or (M, p) arrays
        ``theta``, ``rss``, ``status``, ``beta_ci_low``/``beta_ci_high`` (power law; ``nan`` =
        unbounded or not available), ``ci_method``, ``beta_boot_low``/``high``, forecast columns.

    Examples
    --------
    >>> t = np.array([[0.0, 1.0, 2.0]]); y = np.log([[1.0, 2.0, 4.0]])
    >>> out = fit_series(LAWS["power"], t, y)
    >>> float(out["theta"][0, 2].round(8)), out["status"][0]
    (1.0, 'exact')
    """
    m, n = t.shape
    p, sigma = law.n_params, settings.measurement_error
    lower, upper = law.bounds(y.min(1), y.max(1), settings)
    grid_theta = grid = grid_rss = None
    if law.name == "power":
        grid = _beta_grid(settings)
        grid_rss, g_lv0, g_k = power_profile(t, y, np.broadcast_to(grid, (m, len(grid))),
                                             k_max=settings.max_rate_per_day)
        best = np.argmin(grid_rss, 1)
        pick = np.arange(m)
        grid_theta = np.stack([g_lv0[pick, best], g_k[pick, best], grid[best]], -1)
    theta, rss = np.zeros((m, p)), np.full(m, np.inf)
    for start in _starts(law, t, y, settings, grid_theta):
        th, cost = levenberg_marquardt(law.log_volume, t, y, start, lower, upper)
        better = cost < rss
        theta[better], rss[better] = th[better], cost[better]
    if grid_rss is not None:
        rss = np.minimum(rss, grid_rss.min(1))
    status = np.where(_at_bound(theta, lower, upper), "at-bound", "ok").astype(object)
    if n == p:
        theta, rss, status = _exact_or_ls(law, t, y, theta, rss)
    status = np.where(np.isfinite(rss) & np.isfinite(theta).all(1), status, "failed")
    df = n - p
    scale = np.full(m, sigma) if sigma > 0 else (np.sqrt(rss / df) if df > 0 else
                                                 np.full(m, np.nan))
    out: dict[str, np.ndarray] = {"theta": theta, "rss": rss, "status": status}
    nan = np.full(m, np.nan)
    out["beta_ci_low"], out["beta_ci_high"], out["beta_boot_low"], out["beta_boot_high"] = (
        nan, nan, nan, nan)
    out["ci_method"] = np.full(m, "", dtype=object)
    if law.name == "power" and grid is not None:
        low, high, method = _power_interval(t, y, theta, rss, grid, grid_rss, settings)
        out["beta_ci_low"], out["beta_ci_high"] = low, high
        out["ci_method"] = np.full(m, method, dtype=object)
        if settings.bootstrap > 0:
            out["beta_boot_low"], out["beta_boot_high"] = _bootstrap(
                law, t, y, theta, scale, lower, upper, settings)
    out.update(_forecast(law, t, theta, df, scale, settings.forecast_days, settings, sigma > 0))
    return out


def _check_phased(phased: pd.DataFrame) -> None:
    missing = [c for c in _NEEDED if c not in phased.columns]
    if missing:
        raise UsageError(f"fit_lesions needs the output of assign_phases; missing column(s) "
                         f"{', '.join(missing)}")


def _buckets(fit_rows: pd.DataFrame) -> list[tuple[int, np.ndarray, np.ndarray, np.ndarray]]:
    """Series grouped by length: (n, series ids, days (M, n), log-volumes (M, n))."""
    out = []
    for n, sub in fit_rows.groupby("n_points", sort=True):
        day = sub["day"].to_numpy(float).reshape(-1, n)
        logv = np.log(sub["volume_mm3"].to_numpy(float)).reshape(-1, n)
        out.append((int(n), sub["series"].to_numpy()[::n], day, logv))
    return out


def fit_lesions(phased: pd.DataFrame, *, settings: FitSettings = FitSettings()) -> pd.DataFrame:
    """Fit every growth law in ``settings.models`` to every lesion and phase.

    Parameters
    ----------
    phased : pandas.DataFrame
        Output of :func:`pipeline.growth.phases.assign_phases` (subject, lesion, phase, day,
        volume_mm3, in_fit, fit_exclusion, group). Not modified.
    settings : FitSettings

    Returns
    -------
    pandas.DataFrame
        ``fits.tsv`` rows; columns :data:`COLUMNS` (key columns of docs/outputs.md first).

    Examples
    --------
    >>> phased = pd.DataFrame({"subject": "01", "lesion": 1, "phase": "untreated",
    ...                        "day": [0.0, 1, 2], "volume_mm3": [1.0, 4, 9], "in_fit": True})
    >>> fits = fit_lesions(phased, settings=FitSettings(models=("power",)))
    >>> fits[["model", "n_points", "beta", "alpha", "status"]].round(6).values.tolist()
    [['power', 3, 0.5, 2.0, 'exact']]
    """
    _check_phased(phased)
    table = phased.copy()
    table["subject"] = table["subject"].astype(str)
    table["phase"] = table["phase"].astype(str)
    table = table.sort_values(KEYS + ["day"], kind="stable")
    series = table[KEYS].drop_duplicates().reset_index(drop=True)
    series["series"] = np.arange(len(series))
    table = table.merge(series, on=KEYS, how="left", sort=False)
    fit_rows = table[table["in_fit"].astype(bool)].copy()
    fit_rows["n_points"] = fit_rows.groupby("series")["day"].transform("size")
    pieces = []
    for n, ids, day, logv in _buckets(fit_rows):
        t = day - day[:, :1]
        for name in settings.models:
            law = LAWS[name]
            if n < law.n_params:
                continue
            try:
                result = fit_series(law, t, logv, settings=settings)
            except (ValueError, FloatingPointError, np.linalg.LinAlgError) as exc:
                result = {"theta": np.full((len(ids), law.n_params), np.nan),
                          "status": np.full(len(ids), "failed", dtype=object),
                          "message": f"{type(exc).__name__}: {exc}"}
            pieces.append((law, n, ids, day, logv, result))
    return finish_rows(series, table, pieces, settings=settings)
