"""Population (nonlinear mixed-effects) growth model: every lesion borrows strength from its cohort.

For every (group, phase) and law, each lesion phase's parameters (for the power law ln V0, the
initial specific growth rate k and beta) are drawn from a population normal distribution with mean
``mu`` and between-lesion covariance ``Omega``; the residual error of ln volume ``sigma`` is
shared by the cohort. The model is fitted by maximum marginal likelihood with the Laplace
(first-order conditional, FOCE) approximation (:mod:`pipeline.population_core`). Every group has
its own mean, covariance and residual error (the group is a fixed effect on the mean; groups are
fitted apart, so they also differ in spread). Lesions of one subject are not independent: the
intervals of population means and group contrasts use a subject-cluster-robust (sandwich)
variance with a t(G - 1) reference (G subjects).

- Lesion phases with at least 2 fitted sessions enter (volumes as the per-lesion fits use them:
  :func:`pipeline.phases.assign_phases`, ``in_fit`` rows with a positive volume).
- Individual estimates are conditional modes (empirical Bayes) with an interval from the
  conditional posterior ``N(phi_i*, C_i)`` widened by the uncertainty of ``mu``
  (``C_i + G_i V_mu G_i'`` with ``G_i = C_i Omega^-1`` = d phi_i* / d mu);
  ``shrinkage`` = posterior variance / population variance of the law's shape parameter.
- Forecasts: ln V at the forecast day with the delta-method variance plus sigma^2. When the
  individual curve is not defined there (a power law whose singularity falls before the forecast
  day, or that shrinks to 0), the forecast is the median of 4000 posterior predictive draws
  (draws that blow up count as +infinity); the upper end is n/a when more than the tail share
  of the draws blow up, and the note says how many did. A forecast never vanishes silently.
- Law choice: AIC of the marginal likelihood over the cohort (same lesions and volumes for every
  law); ``best`` marks the lowest.

Research use only: see ``pipeline.DISCLAIMER``.

References
----------
Lindstrom MJ, Bates DM. Biometrics 1990;46:673-687 (nonlinear mixed effects, FOCE).
Liang KY, Zeger SL. Biometrika 1986;73:13-22 (cluster-robust variance).
Benzekry S et al. PLoS Comput Biol 2014;10:e1003800 (growth laws, prediction).
"""
from __future__ import annotations

import numpy as np
import pandas as pd
from scipy import stats

from pipeline.growth.laws import LAWS, Law
from pipeline.growth.population_columns import BACKTEST, CONTRASTS, FITS, LESIONS
from pipeline.growth.population_core import Cohort, PopulationFit
from pipeline.settings import FitSettings, PopulationSettings
from pipeline.growth.population_model import (_arrays, _mu_cov, fit_cohort, individual_cov,
                                               lesion_series, predict)

__all__ = ["population_tables", "from_longitudinal", "lesion_series", "fit_cohort", "COLUMNS"]

COLUMNS = {"population_fits.tsv": FITS, "population_lesions.tsv": LESIONS,
           "group_contrasts.tsv": CONTRASTS, "backtest.tsv": BACKTEST}
_FAILURES = (ValueError, FloatingPointError, np.linalg.LinAlgError)
_SHAPE = {"power": 2, "exponential": 1, "surface": 1, "gompertz": 2, "logistic": 2}
















def _interval(mean: float, var: float, df: int, confidence: float) -> tuple[float, float]:
    if not (np.isfinite(var) and df >= 1):
        return np.nan, np.nan
    half = stats.t.ppf(0.5 * (1.0 + confidence), df) * np.sqrt(max(var, 0.0))
    return mean - half, mean + half


def _fit_row(law: Law, fit: PopulationFit, cohort: Cohort, covariance: str,
             confidence: float) -> dict:
    p = law.n_params
    n_cov = p if covariance == "diagonal" else p * (p + 1) // 2
    n_params = p + n_cov + 1
    cov, df = _mu_cov(fit), fit.n_clusters - 1
    row = {"n_lesions": len(fit.modes), "n_subjects": fit.n_clusters,
           "n_points": int(cohort.w.sum()), "sigma_log": fit.sigma,
           "log_likelihood": fit.log_likelihood, "aic": -2.0 * fit.log_likelihood + 2 * n_params,
           "method": "is-em", "log_v0_mean": fit.mu[0], "k_mean_per_day": fit.mu[1],
           "k_sd_per_day": np.sqrt(fit.omega[1, 1]), "n_params": n_params,
           "covariance": covariance, "converged": fit.converged, "iterations": fit.iterations,
           "parameters": " ".join(law.params), "confidence": confidence,
           "omega": " ".join(f"{v:.6g}" for v in fit.omega.ravel())}
    row["k_mean_ci_low"], row["k_mean_ci_high"] = _interval(fit.mu[1], cov[1, 1], df, confidence)
    if law.name == "power":
        row["beta_mean"], row["beta_sd"] = fit.mu[2], np.sqrt(fit.omega[2, 2])
        row["beta_mean_ci_low"], row["beta_mean_ci_high"] = _interval(fit.mu[2], cov[2, 2], df,
                                                                      confidence)
    elif law.beta is not None:
        row.update(beta_mean=law.beta, beta_sd=0.0, beta_mean_ci_low=law.beta,
                   beta_mean_ci_high=law.beta)
    notes = []
    if not fit.converged:
        notes.append(f"not converged after {fit.iterations} cycles")
    m = fit.cond_modes
    at_bound = (np.isclose(m, cohort.lower) | np.isclose(m, cohort.upper))[:, 1:]
    if at_bound.any():
        notes.append(f"{int(at_bound.any(1).sum())} lesion(s) with a parameter at its bound")
    if fit.n_clusters < 2:
        notes.append("one subject: no interval for the population means")
    elif fit.n_clusters < 10:
        notes.append(f"only {fit.n_clusters} subjects: the robust intervals are rough")
    row["note"] = "; ".join(notes)
    return row


def _lesion_rows(law: Law, fit: PopulationFit, a: dict, settings: FitSettings) -> pd.DataFrame:
    cov = individual_cov(fit)
    z = stats.norm.ppf(0.5 * (1.0 + settings.confidence))
    t_f = a["t"].max(1) + settings.forecast_days
    centre, low, high, blown = predict(law, fit, cov, t_f, confidence=settings.confidence,
                                       seed=settings.seed)
    j = _SHAPE[law.name]
    shrink = np.clip(fit.cond_cov[:, j, j] / fit.omega[j, j], 0.0, 1.0)
    n_points = a["w"].sum(1).astype(int)
    out = a["ids"].copy()
    out["n_points"] = n_points
    out["day_start"], out["day_end"] = a["day_start"], a["day_end"]
    out["v0_mm3"], out["k_per_day"] = np.exp(fit.modes[:, 0]), law.initial_rate(fit.modes)
    nan = np.full(len(out), np.nan)
    out["beta"], out["beta_ci_low"], out["beta_ci_high"] = nan, nan, nan
    if law.name == "power":
        sd = np.sqrt(cov[:, 2, 2])
        out["beta"], out["beta_ci_low"], out["beta_ci_high"] = (
            fit.modes[:, 2], fit.modes[:, 2] - z * sd, fit.modes[:, 2] + z * sd)
    elif law.beta is not None:
        out["beta"] = out["beta_ci_low"] = out["beta_ci_high"] = law.beta
    out["shrinkage"] = shrink
    out["forecast_day"] = a["day_end"] + settings.forecast_days
    out["forecast_mm3"], out["forecast_low_mm3"] = np.exp(centre), np.exp(low)
    out["forecast_high_mm3"] = np.where(np.isfinite(high), np.exp(high), np.nan)
    out["note"] = [_lesion_note(law, n, s, b) for n, s, b in zip(n_points, shrink, blown)]
    return out


def _lesion_note(law: Law, n: int, shrink: float, blown: float) -> str:
    notes = []
    what = "beta" if law.name == "power" else law.params[_SHAPE[law.name]]
    if n == 2 and law.n_params > 2:
        notes.append(f"2 sessions: {what} comes from the population (shrinkage {shrink:.2f})")
    elif shrink > 0.8:
        notes.append(f"{what} mostly from the population (shrinkage {shrink:.2f})")
    if blown > 0:
        notes.append(f"the individual curve is not defined at the forecast day; forecast from "
                     f"posterior draws, {100 * blown:.1f} % of which blow up before it")
    return "; ".join(notes)


def _contrasts(fits: list[tuple[dict, PopulationFit]], confidence: float) -> list[dict]:
    """Wald contrasts of beta and k between every pair of groups of a (phase, law)."""
    rows = []
    for i, (ra, fa) in enumerate(fits):
        for rb, fb in fits[i + 1:]:
            row = {"group_a": ra["group"], "group_b": rb["group"], "phase": ra["phase"],
                   "model": ra["model"]}
            df = fa.n_clusters + fb.n_clusters - 2
            for j, name, key in ((2, "beta_diff", "p_value"), (1, "k_diff_per_day", "k_p_value")):
                if j == 2 and ra["model"] != "power":
                    continue
                diff = fa.mu[j] - fb.mu[j]
                var = _mu_cov(fa)[j, j] + _mu_cov(fb)[j, j]
                lo, hi = _interval(diff, var, df, confidence)
                stem = "beta_diff" if j == 2 else "k_diff"
                row[name], row[f"{stem}_ci_low"], row[f"{stem}_ci_high"] = diff, lo, hi
                row[key] = (2 * stats.t.sf(abs(diff) / np.sqrt(var), df)
                            if df >= 1 and var > 0 else np.nan)
            rows.append(row)
    return rows


def _frame(rows: list[dict] | pd.DataFrame, columns: dict) -> pd.DataFrame:
    table = pd.DataFrame(rows)
    for name in columns:
        if name not in table:
            table[name] = np.nan
    return table[list(columns)]


def population_tables(phased: pd.DataFrame, *, settings: FitSettings = FitSettings(),
                      population: PopulationSettings = PopulationSettings()
                      ) -> dict[str, pd.DataFrame]:
    """Population fits, individual estimates, group contrasts and the backtest.

    Parameters
    ----------
    phased : pandas.DataFrame
        Output of :func:`pipeline.phases.assign_phases` (with ``group`` when there are groups).
    settings : FitSettings
        Bounds, confidence level, forecast horizon and seed (shared with the per-lesion fits).
    population : PopulationSettings
        Laws, covariance form, backtest on or off.

    Returns
    -------
    dict of pandas.DataFrame
        Keyed by file name (``population_fits.tsv``, ``population_lesions.tsv``,
        ``group_contrasts.tsv``, ``backtest.tsv``); columns as in :data:`COLUMNS`.

    Examples
    --------
    >>> rng = np.random.default_rng(3)
    >>> days = np.array([0.0, 40, 80, 120])
    >>> rows = [{"subject": f"s{i // 2}", "lesion": i % 2 + 1, "phase": "untreated", "day": d,
    ...          "volume_mm3": 100 * np.exp((0.01 + 0.002 * rng.normal()) * d + 0.05 * e),
    ...          "in_fit": True} for i in range(30) for d, e in zip(days, rng.normal(size=4))]
    >>> out = population_tables(pd.DataFrame(rows),
    ...                         population=PopulationSettings(models=("exponential",)))
    >>> fit = out["population_fits.tsv"].iloc[0]
    >>> int(fit.n_lesions), int(fit.n_subjects), bool(fit.best), float(round(fit.k_mean_per_day, 2))
    (30, 15, True, 0.01)
    """
    series = lesion_series(phased)
    fit_rows, lesion_parts, contrast_rows = [], [], []
    by_phase_law: dict[tuple[str, str], list] = {}
    for (group, phase), rows in series.groupby(["group", "phase"], sort=True):
        a = _arrays(rows)
        for name in population.models:
            law = LAWS[name]
            row = {"group": group, "phase": phase, "model": name}
            try:
                fit, cohort = fit_cohort(law, a, settings=settings,
                                         covariance=population.covariance)
                row.update(_fit_row(law, fit, cohort, population.covariance,
                                    settings.confidence))
            except _FAILURES as exc:        # one law failing never stops the others
                fit_rows.append({**row, "n_lesions": len(a["t"]), "method": "is-em",
                                 "note": f"failed: {type(exc).__name__}: {exc}"})
                continue
            fit_rows.append(row)
            by_phase_law.setdefault((phase, name), []).append((row, fit))
            lesion_parts.append(_lesion_rows(law, fit, a, settings).assign(
                group=group, phase=phase, model=name))
    for (_, _), fits in sorted(by_phase_law.items()):
        contrast_rows += _contrasts(fits, settings.confidence)
    fits = _frame(fit_rows, FITS)
    if len(fits):
        low = fits.groupby(["group", "phase"])["aic"].transform("min")
        fits["best"] = np.isclose(fits["aic"], low, rtol=0, atol=1e-9)
    lesions = _frame(pd.concat(lesion_parts, ignore_index=True) if lesion_parts else [],
                     LESIONS)
    out = {"population_fits.tsv": fits, "population_lesions.tsv": lesions,
           "group_contrasts.tsv": _frame(contrast_rows, CONTRASTS)}
    if population.backtest:
        from pipeline.growth.population_backtest import backtest

        out["backtest.tsv"] = _frame(backtest(series, settings=settings,
                                              population=population), BACKTEST)
    else:
        out["backtest.tsv"] = _frame([], BACKTEST)
    return out


def from_longitudinal(longitudinal: pd.DataFrame, events: pd.DataFrame | None = None, *,
                      config=None) -> dict[str, pd.DataFrame]:
    """:func:`population_tables` from ``longitudinal.tsv`` rows and events (as ``fit`` reads
    them): phases and the sessions that enter the fits come from
    :func:`pipeline.phases.assign_phases`, exactly as for the per-lesion fits."""
    from pipeline.growth import phases
    from pipeline.config import Config

    config = config or Config()
    table = longitudinal if "group" in longitudinal.columns else longitudinal.assign(group="")
    phased = phases.assign_phases(table, events, settings=config.fitting)
    return population_tables(phased, settings=config.fitting, population=config.population)
