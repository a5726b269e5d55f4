"""Turn array fit results into ``fits.tsv`` rows: derived figures, AICc, ``best`` and notes.

Helper of :mod:`pipeline.growth` (kept apart to keep modules small); see that module for the
methods. :data:`COLUMNS` describes every column of ``fits.tsv`` for its JSON sidecar.
"""
from __future__ import annotations

import numpy as np
import pandas as pd

from pipeline.growth.laws import LAWS, Law
from pipeline.settings import FitSettings

__all__ = ["COLUMNS", "finish_rows", "aicc"]

_STATUS = {"ok": "fitted", "exact": "exactly as many sessions as parameters: exact solution",
           "no-exact-solution": "as many sessions as parameters but no exact solution exists; "
                                "the bounded least-squares curve is reported",
           "at-bound": "fitted; a parameter is at its bound",
           "failed": "the fit failed (reason in note)",
           "not-fitted": "no law could be fitted (reason in note)"}

COLUMNS: dict[str, dict] = {
    "subject": {"Description": "Subject label as given in the input.", "Units": "n/a"},
    "lesion": {"Description": "Lesion track number (stable across sessions).", "Units": "n/a"},
    "phase": {"Description": "Treatment phase ('untreated', 'after-<event>', ...).",
              "Units": "n/a"},
    "model": {"Description": "Growth law fitted.", "Units": "n/a",
              "Levels": {**{k: f"{law.ode} ({law.source})" for k, law in LAWS.items()}}},
    "n_points": {"Description": "Sessions entering the fit.", "Units": "n/a"},
    "day_start": {"Description": "Day of the first fitted session (t = 0 of the fit).",
                  "Units": "day"},
    "day_end": {"Description": "Day of the last fitted session.", "Units": "day"},
    "v0_mm3": {"Description": "Fitted volume at day_start.", "Units": "mm^3"},
    "alpha": {"Description": "alpha of dV/dt = alpha V^beta (power, exponential, surface laws); "
                             "depends on the volume unit unless beta = 1.",
              "Units": "mm^(3(1-beta)) / day"},
    "beta": {"Description": "Exponent beta of dV/dt = alpha V^beta (fitted for the power law, "
                            "1 for exponential, 2/3 for surface; n/a for other laws).",
             "Units": "n/a"},
    "beta_ci_low": {"Description": "Lower end of the profile-likelihood interval for beta (power "
                                   "law); n/a when unbounded or not available (see note).",
                    "Units": "n/a"},
    "beta_ci_high": {"Description": "Upper end of the profile-likelihood interval for beta.",
                     "Units": "n/a"},
    "aicc": {"Description": "Corrected Akaike information criterion on log-volume residuals "
                            "(Hurvich and Tsai 1989); n/a when undefined (n <= k + 1, or a zero "
                            "residual: sigma_log below 1e-8).",
             "Units": "n/a"},
    "note": {"Description": "Why a value is missing, what was left out, warnings.", "Units": "n/a"},
    "best": {"Description": "True on the row with the lowest AICc of its lesion and phase; a law "
                            "that fits exactly with residual dof (zero residual, AICc -infinity) "
                            "comes first, fewest parameters among such laws; fewest parameters "
                            "when AICc is undefined for every law. The note says which.",
             "Units": "n/a"},
    "akaike_weight": {"Description": "Akaike weight among the laws of this lesion and phase with "
                                     "a defined AICc (Burnham and Anderson 2002).", "Units": "n/a"},
    "k_per_day": {"Description": "Initial specific growth rate (dV/dt)/V at day_start "
                                 "(= alpha V0^(beta-1) for the power law); unit-free in volume.",
                  "Units": "1/day"},
    "fold_change": {"Description": "Observed volume at day_end divided by observed volume at "
                                   "day_start; beta is fragile when this is near 1.",
                    "Units": "n/a"},
    "singularity_day": {"Description": "Day at which the fitted power-law curve (beta > 1) goes "
                                       "to infinity: a model artefact, not a prediction; always "
                                       "after day_end for a valid fit.", "Units": "day"},
    "doubling_time_days": {"Description": "Days for the fitted curve to double from its volume at "
                                          "day_end; n/a when it never doubles.", "Units": "day"},
    "sgr_per_day": {"Description": "Specific growth rate ln(V_end/V_start)/(day_end - day_start) "
                                   "of the fitted curve (Mehrara et al. 2007).", "Units": "1/day"},
    "forecast_day": {"Description": "Day of the forecast: day_end + forecast_days.",
                     "Units": "day"},
    "forecast_mm3": {"Description": "Fitted curve's volume at forecast_day.", "Units": "mm^3"},
    "forecast_low_mm3": {"Description": "Lower end of the prediction interval at forecast_day.",
                         "Units": "mm^3"},
    "forecast_high_mm3": {"Description": "Upper end of the prediction interval at forecast_day.",
                          "Units": "mm^3"},
    "status": {"Description": "Outcome of the fit.", "Units": "n/a", "Levels": _STATUS},
    "group": {"Description": "Group from the manifest ('all' when none was given).",
              "Units": "n/a"},
    "df_resid": {"Description": "Residual degrees of freedom n_points - parameters.",
                 "Units": "n/a"},
    "rss_log": {"Description": "Residual sum of squares of natural-log volumes.", "Units": "n/a"},
    "sigma_log": {"Description": "Log-volume error SD used for intervals: configured "
                                 "measurement_error or sqrt(rss_log/df_resid).", "Units": "n/a"},
    "ci_method": {"Description": "How the beta interval was computed.", "Units": "n/a",
                  "Levels": {"profile-F": "profile likelihood, F(1, n-p) (error estimated)",
                             "profile-chi2": "profile likelihood, chi2(1) (error configured)",
                             "": "no interval"}},
    "beta_boot_low": {"Description": "Lower percentile of beta over parametric-bootstrap refits "
                                     "(n/a when off).", "Units": "n/a"},
    "beta_boot_high": {"Description": "Upper percentile of beta over parametric-bootstrap refits.",
                       "Units": "n/a"},
    "capacity_mm3": {"Description": "Carrying capacity K (logistic; Gompertz V0 exp(k/c)).",
                     "Units": "mm^3"},
    "gompertz_c_per_day": {"Description": "Gompertz deceleration rate c.", "Units": "1/day"},
    "logistic_r_per_day": {"Description": "Logistic rate r.", "Units": "1/day"},
}

#: fits.tsv columns of the response laws' figures and of the fitted window
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
    "first_absent_day": {"Description": "Whole-phase rows: first day of the phase the lesion was "
                         "not seen (absent or below detection; entered left-censored)",
                         "Units": "day"},
}
COLUMNS.update(WINDOW_COLUMNS)
ORDER = list(COLUMNS)


def aicc(rss: np.ndarray, n: int, p: int, sigma: float) -> np.ndarray:
    """AICc of Gaussian log-volume residuals (constants common to all laws dropped).

    Unknown error (``sigma == 0``): k = p + 1, AIC = n ln(RSS/n) + 2k; known: k = p,
    AIC = RSS/sigma^2 + 2k; AICc = AIC + 2k(k+1)/(n-k-1), ``nan`` when n <= k + 1
    (docs/methods.md §1.6, check value C18).

    Examples
    --------
    >>> float(aicc(np.array([0.5]), 6, 3, 0.0)[0] - 6 * np.log(0.5 / 6) - 8)
    40.0
    """
    rss = np.asarray(rss, float)
    k = p if sigma > 0 else p + 1
    if n - k - 1 <= 0:
        return np.full(rss.shape, np.nan)
    with np.errstate(divide="ignore", invalid="ignore"):
        aic = rss / sigma ** 2 + 2 * k if sigma > 0 else n * np.log(rss / n) + 2 * k
    aic = np.where(np.isfinite(aic), aic, np.nan)
    return aic + 2.0 * k * (k + 1) / (n - k - 1)


def _law_columns(law: Law, theta: np.ndarray) -> dict[str, np.ndarray]:
    lv0, k = theta[:, 0], theta[:, 1]
    m = len(theta)
    nan = np.full(m, np.nan)
    cols = {"v0_mm3": np.exp(lv0), "k_per_day": law.initial_rate(theta), "alpha": nan,
            "beta": nan, "capacity_mm3": nan, "gompertz_c_per_day": nan,
            "logistic_r_per_day": nan, "singularity_day_rel": nan}
    if law.name == "power" or law.beta is not None:
        beta = theta[:, 2] if law.name == "power" else np.full(m, law.beta)
        cols["beta"], cols["alpha"] = beta, k * np.exp(lv0 * (1.0 - beta))
        with np.errstate(divide="ignore", invalid="ignore"):
            cols["singularity_day_rel"] = np.where((beta > 1) & (k > 0),
                                                   1.0 / ((beta - 1.0) * k), np.nan)
    elif law.name == "gompertz":
        c = theta[:, 2]
        cols["gompertz_c_per_day"] = c
        with np.errstate(divide="ignore", over="ignore", invalid="ignore"):
            cap = np.exp(lv0 + k / c)
        cols["capacity_mm3"] = np.where((c > 0) & np.isfinite(cap), cap, np.nan)
    elif law.name == "logistic":
        cols["logistic_r_per_day"], cols["capacity_mm3"] = k, np.exp(theta[:, 2])
    if law.derived is not None:
        cols.update(law.derived(theta))
    return cols


def _piece_frame(law: Law, n: int, ids: np.ndarray, day: np.ndarray, logv: np.ndarray,
                 res: dict, settings: FitSettings) -> pd.DataFrame:
    theta = np.asarray(res["theta"], float)
    m = len(ids)
    nan = np.full(m, np.nan)
    t = day - day[:, :1]
    t_end = t[:, -1]
    rss = np.asarray(res.get("rss", nan), float)
    df = n - law.n_params
    sigma = settings.measurement_error
    with np.errstate(all="ignore"):
        curve = law.log_volume(np.stack([np.zeros(m), t_end], -1), theta)
        sgr = np.where(t_end > 0, (curve[:, 1] - curve[:, 0]) / t_end, np.nan)
        doubling = law.gain_time(theta, t_end, np.log(2.0))
    frame = pd.DataFrame({"series": ids, "model": law.name, "n_points": n,
                          "day_start": day[:, 0], "day_end": day[:, -1],
                          **_law_columns(law, theta),
                          "beta_ci_low": res.get("beta_ci_low", nan),
                          "beta_ci_high": res.get("beta_ci_high", nan),
                          "aicc": aicc(rss, n, law.n_params, sigma),
                          "fold_change": np.exp(logv[:, -1] - logv[:, 0]),
                          "doubling_time_days": doubling, "sgr_per_day": sgr,
                          "forecast_day": day[:, -1] + settings.forecast_days,
                          "forecast_mm3": res.get("forecast_mm3", nan),
                          "forecast_low_mm3": res.get("forecast_low_mm3", nan),
                          "forecast_high_mm3": res.get("forecast_high_mm3", nan),
                          "status": res["status"], "df_resid": df, "rss_log": rss,
                          "sigma_log": sigma if sigma > 0 else (
                              np.sqrt(rss / df) if df > 0 else nan),
                          "ci_method": res.get("ci_method", ""),
                          "beta_boot_low": res.get("beta_boot_low", nan),
                          "beta_boot_high": res.get("beta_boot_high", nan),
                          "n_params": law.n_params})
    frame["singularity_day"] = frame["day_start"] + frame.pop("singularity_day_rel")
    if "nadir_day_rel" in frame:
        frame["nadir_day"] = frame["day_start"] + frame.pop("nadir_day_rel")
    frame["note"] = [[] for _ in range(m)]
    _fit_notes(frame, law, res, settings)
    if law.name == "power":
        _flat_series(frame, logv)
    return frame


def _flat_series(frame: pd.DataFrame, logv: np.ndarray) -> None:
    """Same volume at every fitted session: k = 0 fits at any beta, so beta is n/a (a value at
    a bound would pass for a finding, e.g. as a marker)."""
    flat = np.ptp(logv, axis=1) == 0
    if not flat.any():
        return
    frame.loc[flat, ["beta", "beta_ci_low", "beta_ci_high", "beta_boot_low",
                     "beta_boot_high"]] = np.nan
    text = "same volume at every fitted session: any beta fits (k = 0), so beta is n/a"
    frame["note"] = [[text] if f else notes for f, notes in zip(flat, frame["note"])]


def _fit_notes(frame: pd.DataFrame, law: Law, res: dict, settings: FitSettings) -> None:
    def add(mask: np.ndarray, text: str | pd.Series) -> None:
        for i in np.flatnonzero(mask):
            frame["note"].iat[i].append(text if isinstance(text, str) else text.iat[i])

    status = frame["status"].to_numpy()
    add(status == "failed", res.get("message", "fit failed: no finite solution in the bounds"))
    add(status == "at-bound", "a parameter is at its bound: the estimate is set by the bound")
    if law.name == "power":
        add(status == "no-exact-solution", "no exact 3-point solution (middle volume not strictly "
                                           "between the others)")
        unknown = settings.measurement_error == 0
        add((status == "exact") & unknown, "exact fit, zero residual dof: no interval for beta "
                                           "(configure measurement_error for one)")
        has_ci = frame["ci_method"].to_numpy() != ""
        low, high = frame["beta_ci_low"].to_numpy(), frame["beta_ci_high"].to_numpy()
        add(has_ci & np.isnan(low), f"beta interval unbounded below within beta_bounds "
                                    f"{list(settings.beta_bounds)}")
        add(has_ci & np.isnan(high), f"beta interval unbounded above within beta_bounds "
                                     f"{list(settings.beta_bounds)}")
        wide = has_ci & (np.isnan(low) | np.isnan(high) |
                         (high - low > settings.max_beta_ci_width))
        add(wide, "beta not pinned down by this lesion's data: prefer the group fit's beta")
    sing = frame["singularity_day"].to_numpy()
    past = np.isfinite(sing) & (sing <= frame["forecast_day"].to_numpy())
    add(past, "forecast_day is past the curve's singularity: no forecast")
    _forecast_notes(frame, add, past | (status == "failed"))


#: Forecasts above this volume are flagged: more than an adult skull holds (about 1.2-1.7 litres,
#: from memory), so the extrapolated law has broken down (mm^3).
IMPLAUSIBLE_MM3 = 2.0e6


def _forecast_notes(frame: pd.DataFrame, add, quiet: np.ndarray) -> None:
    """Overflowing forecasts become n/a with a note; implausibly large ones get a note."""
    names = ["forecast_mm3", "forecast_low_mm3", "forecast_high_mm3"]
    values = frame[names].to_numpy(float)
    overflow = np.isinf(values).any(1) | (values > np.finfo(float).max / 10).any(1)
    frame.loc[overflow, names] = np.nan
    add(overflow & ~quiet, "forecast overflows the number range (the fitted curve grows without "
                           "bound over forecast_days): forecast n/a")
    big = np.nan_to_num(frame[names].to_numpy(float), nan=0.0).max(1) > IMPLAUSIBLE_MM3
    add(big & ~quiet, f"forecast above {IMPLAUSIBLE_MM3:.0f} mm^3 (more than a skull holds): the "
                      "law's extrapolation has broken down; do not read it as a prediction")


def _exclusion_notes(table: pd.DataFrame) -> pd.Series:
    out = table[~table["in_fit"].astype(bool)]
    if "fit_exclusion" not in out.columns or len(out) == 0:
        return pd.Series(dtype=object)
    counts = out.groupby(["series", "fit_exclusion"])["day"].agg(_days_text)
    text = counts.reset_index().assign(
        t=lambda d: d["fit_exclusion"].astype(str) + " " + d["day"])
    return "sessions left out: " + text.groupby("series")["t"].agg(", ".join)


#: A fit whose sigma_log is below this has a zero residual (exact to rounding; common practice).
ZERO_SIGMA = 1e-8


def _names(rows: pd.DataFrame, mask: pd.Series) -> pd.Series:
    """Per series, the models of the rows in ``mask`` joined by ', '."""
    return rows[mask].groupby("series")["model"].agg(", ".join)


def _zero_residual(rows: pd.DataFrame, usable: pd.Series, settings: FitSettings) -> pd.Series:
    """Rows that fit exactly although they have residual dof (sigma estimated): AICc -> -inf."""
    if settings.measurement_error > 0:
        return pd.Series(False, index=rows.index)
    sigma = pd.to_numeric(rows["sigma_log"], errors="coerce") if "sigma_log" in rows else np.nan
    df = pd.to_numeric(rows["df_resid"], errors="coerce") if "df_resid" in rows else np.nan
    return usable & (df > 0) & (sigma < ZERO_SIGMA)


def _days_text(days: pd.Series) -> str:
    """``2 (days 130, 160)``: how many sessions were left out and which."""
    shown = ", ".join(f"{float(d):g}" for d in days)
    return f"{len(days)} (day{'s' if len(days) > 1 else ''} {shown})"


def _choose_best(rows: pd.DataFrame, settings: FitSettings) -> pd.DataFrame:
    """``best`` and ``akaike_weight`` per series, with a note on the best row saying why.

    A law with a zero residual and residual dof (AICc -> -infinity) beats every law with a
    positive residual; among such laws the fewest parameters win. Laws whose AICc is undefined
    (too few sessions for their parameters) are named in the note when others were compared.
    """
    order = {m: i for i, m in enumerate(settings.models)}
    usable = ~rows["status"].isin(["failed", "not-fitted"])
    zero = _zero_residual(rows, usable, settings)
    rows.loc[zero, "aicc"] = np.nan              # a finite value here would be rounding noise
    exact_series = set(rows.loc[zero, "series"])
    in_exact = rows["series"].isin(exact_series)
    rows["akaike_weight"] = np.nan
    finite = usable & rows["aicc"].notna() & ~in_exact
    if finite.any():
        delta = rows["aicc"] - rows[finite].groupby("series")["aicc"].transform("min")
        weight = np.exp(-0.5 * delta[finite])
        total = weight.groupby(rows.loc[finite, "series"]).transform("sum")
        rows.loc[finite, "akaike_weight"] = weight / total
    tier = np.where(zero, 0, np.where(finite, 1, 2))
    key = np.where(zero | ~finite, rows["n_params"], rows["aicc"])
    rank = rows.assign(tier=tier, order=rows["model"].map(order), key=key)[usable]
    rank = rank.sort_values(["series", "tier", "key", "rss_log", "order"])
    first = rank.groupby("series").head(1)
    rows["best"] = False
    rows.loc[first.index, "best"] = True
    _best_notes(rows, first, zero, finite, usable)
    return rows


def _best_notes(rows: pd.DataFrame, first: pd.DataFrame, zero: pd.Series, finite: pd.Series,
                usable: pd.Series) -> None:
    exact_names = _names(rows, zero)
    positive = _names(rows, usable & ~zero)
    undefined = _names(rows, usable & ~zero & rows["aicc"].isna())
    for i, tier in zip(first.index, first["tier"].to_numpy()):
        series, model = rows.at[i, "series"], rows.at[i, "model"]
        note = rows.at[i, "note"]
        if tier == 0:
            others = [m for m in exact_names[series].split(", ") if m != model]
            note.append(f"best: {model} fits exactly (zero residual with residual dof, AICc "
                        "-infinity), so it is preferred to every law with a positive residual"
                        + (f" ({positive[series]})" if series in positive.index else "")
                        + (f"; also exact: {', '.join(others)} (more parameters, or later "
                           "in models)" if others else "") + "; Akaike weights undefined")
        elif tier == 2:
            note.append("best by fewest parameters: AICc undefined for every law "
                        "(too few sessions)")
        elif series in undefined.index:
            note.append(f"not compared by AICc (too few sessions for their parameters): "
                        f"{undefined[series]}")


def finish_rows(series: pd.DataFrame, table: pd.DataFrame, pieces: list, *,
                settings: FitSettings) -> pd.DataFrame:
    """Assemble ``fits.tsv`` rows from the fitted pieces (see ``growth.fit_lesions``)."""
    frames = [_piece_frame(law, n, ids, day, logv, res, settings)
              for law, n, ids, day, logv, res in pieces]
    rows = pd.concat(frames, ignore_index=True) if frames else pd.DataFrame(
        {c: pd.Series(dtype=object) for c in ["series", "note", "model", "status", "aicc",
                                              "n_params", "rss_log"]})
    n_fit = table[table["in_fit"].astype(bool)].groupby("series").size()
    n_fit = n_fit.reindex(series["series"], fill_value=0)
    missing = series[~series["series"].isin(rows["series"])]
    if len(missing):
        none = pd.DataFrame({"series": missing["series"].to_numpy(), "model": "none",
                             "status": "not-fitted",
                             "n_points": n_fit.loc[missing["series"]].to_numpy()})
        none["note"] = [[f"no law fitted: {n} fitted session(s), the laws need at least "
                         f"{min(LAWS[m].n_params for m in settings.models)}"] for n in
                        none["n_points"]]
        rows = pd.concat([rows, none], ignore_index=True)
    rows = _choose_best(rows, settings)
    for i in rows.index[rows["best"].to_numpy()]:
        n = n_fit.loc[rows.at[i, "series"]]
        skipped = [f"{m} needs {LAWS[m].n_params}" for m in settings.models
                   if LAWS[m].n_params > n]
        if skipped:
            rows.at[i, "note"].append(f"not fitted with {n} session(s): " + ", ".join(skipped))
    excl = _exclusion_notes(table)
    rows["note"] = [
        "; ".join(([excl[s]] if s in excl.index else []) + notes)
        for s, notes in zip(rows["series"], rows["note"])]
    group = table.groupby("series")["group"].first() if "group" in table.columns else None
    rows = rows.merge(series, on="series", how="left")
    rows["group"] = (rows["series"].map(group).fillna("").astype(str).replace(
        {"": "all", "n/a": "all", "nan": "all"}) if group is not None else "all")
    rows = rows.sort_values(["subject", "lesion", "phase", "model"], kind="stable")
    rows = rows.reindex(columns=ORDER).reset_index(drop=True)
    for name in ("n_points", "df_resid"):          # counts print as integers, never "1.0"
        rows[name] = pd.to_numeric(rows[name], errors="coerce").round().astype("Int64")
    return rows


#: Columns of unfitted.tsv: lesion phases where no growth law could be fitted.
UNFITTED_COLUMNS = {
    "subject": {"Description": "Subject label"},
    "lesion": {"Description": "Lesion track id"},
    "phase": {"Description": "Phase (untreated, after-<event>, ...)"},
    "n_points": {"Description": "Sessions usable for fitting in this phase"},
    "group": {"Description": "Group of the subject"},
    "note": {"Description": "Why no growth law was fitted"},
}


#: Columns of group_fits.tsv (:func:`pipeline.growth.group_fits.fit_groups`).
GROUP_COLUMNS: dict[str, dict] = {
    "group": {"Description": "Group from the manifest; subjects without a group form 'all'"},
    "phase": {"Description": "Treatment phase the lesions' sessions belong to (untreated, "
                             "after-<event>, ...)"},
    "model": {"Description": "Growth law with the shared exponent: dV/dt = alpha * V^beta",
              "Levels": {"power": "power law (generalized von Bertalanffy), beta shared"}},
    "n_lesions": {"Description": "Lesions in the fit (each with at least 3 fitted sessions in "
                                 "the phase; lesions with the same volume at every fitted session "
                                 "are left out and counted in note)", "Units": "lesions"},
    "n_points": {"Description": "Fitted (lesion, session) volumes", "Units": "volumes"},
    "beta": {"Description": "Shared growth exponent beta of dV/dt = alpha * V^beta",
             "Units": "1"},
    "beta_ci_low": {"Description": "Lower end of the profile-likelihood confidence interval of "
                                   "beta (F-based, sigma unknown); n/a when the profile stays "
                                   "below the threshold down to the lower bound of beta",
                    "Units": "1"},
    "beta_ci_high": {"Description": "Upper end of the profile-likelihood confidence interval of "
                                    "beta; n/a when unbounded within the bounds of beta",
                     "Units": "1"},
    "n_subjects": {"Description": "Subjects contributing lesions", "Units": "subjects"},
    "rss_log": {"Description": "Residual sum of squares of natural-log volumes at the optimum",
                "Units": "1"},
    "dof": {"Description": "Residual degrees of freedom: n_points - (2 * n_lesions + 1)",
            "Units": "1"},
    "sigma_log": {"Description": "Residual standard deviation of log-volume, sqrt(rss_log / "
                               "dof): roughly the relative volume error", "Units": "1"},
    "confidence": {"Description": "Confidence level of the beta interval", "Units": "1"},
    "ci_method": {"Description": "Reference distribution of the profile-likelihood interval",
                  "Levels": {"F": "F(1, dof): sigma estimated from the residuals",
                             "chi2": "chi-square(1): sigma fixed to the configured "
                                     "measurement_error"}},
    "p_exponential": {"Description": "F-test p-value of beta = 1 (exponential growth) against "
                                     "the free shared beta", "Units": "1"},
    "median_fold_change": {"Description": "Median over lesions of the last / first fitted "
                                          "volume in the phase", "Units": "1"},
    "n_singular": {"Description": "Lesions whose finite-time singularity (beta > 1) or vanishing "
                                  "time (beta < 1, shrinking) would fall inside their fitted "
                                  "window at the fitted beta; 0 for a valid fit",
                   "Units": "lesions"},
    "status": {"Description": "Outcome of the fit",
               "Levels": {"ok": "fitted, interval computed",
                          "exact": "no residual degrees of freedom: beta without interval",
                          "at-bound": "beta sits on a bound of beta_bounds",
                          "no-lesions": "no lesion has enough fitted sessions in this phase",
                          "failed": "the solver did not converge or the fit is invalid "
                                    "(see note)"}},
    "note": {"Description": "Why a fit is missing, partial or to be read with care"},
}
