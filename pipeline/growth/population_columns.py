"""Column dictionaries (descriptions, units) of the population tables, for their JSON sidecars.

Helper of :mod:`pipeline.population`; see that module for the methods.
"""
from __future__ import annotations

from pipeline.growth.laws import LAWS

__all__ = ["FITS", "LESIONS", "CONTRASTS", "BACKTEST"]

_MODEL = {"Description": "Growth law of the population model.", "Units": "n/a",
          "Levels": {k: law.ode for k, law in LAWS.items()}}
_GROUP = {"Description": "Group from the manifest ('all' when none was given).", "Units": "n/a"}
_PHASE = {"Description": "Treatment phase ('untreated', 'after-<event>', ...).", "Units": "n/a"}

FITS: dict[str, dict] = {
    "group": _GROUP,
    "phase": _PHASE,
    "model": _MODEL,
    "n_lesions": {"Description": "Lesion phases in the fit (each with at least 2 fitted "
                                 "sessions).", "Units": "lesions"},
    "n_subjects": {"Description": "Subjects contributing lesions (clusters of the robust "
                                  "variance).", "Units": "subjects"},
    "n_points": {"Description": "Fitted (lesion, session) volumes.", "Units": "volumes"},
    "beta_mean": {"Description": "Population mean of beta of dV/dt = alpha V^beta (power law; "
                                 "the fixed 1 or 2/3 of the exponential and surface laws; n/a "
                                 "for laws not of that form).", "Units": "1"},
    "beta_mean_ci_low": {"Description": "Lower end of the Wald interval of beta_mean, "
                                        "subject-cluster-robust variance, t(n_subjects - 1).",
                         "Units": "1"},
    "beta_mean_ci_high": {"Description": "Upper end of the interval of beta_mean.", "Units": "1"},
    "beta_sd": {"Description": "Between-lesion standard deviation of beta, sqrt(Omega_beta) "
                               "(0 for the laws with a fixed beta).", "Units": "1"},
    "sigma_log": {"Description": "Residual standard deviation of natural-log volume, estimated "
                                 "from the whole cohort: roughly the relative volume error.",
                  "Units": "1"},
    "log_likelihood": {"Description": "Marginal (importance-sampling) "
                                      "log-likelihood of the natural-log volumes.", "Units": "1"},
    "aic": {"Description": "-2 log_likelihood + 2 n_params; laws compare within the group and "
                           "phase (same lesions, same volumes).", "Units": "1"},
    "best": {"Description": "True for the law with the lowest aic of its group and phase "
                            "(cohort-level law choice).", "Units": "n/a"},
    "method": {"Description": "Estimation method.", "Units": "n/a",
               "Levels": {"is-em": "maximum marginal likelihood by EM, importance-sampling "
                                        "E-step with the first-order conditional (Laplace) "
                                        "proposal, SQUAREM acceleration"}},
    "note": {"Description": "Convergence, at-bound modes, small cohorts.", "Units": "n/a"},
    "k_mean_per_day": {"Description": "Population mean of the initial specific growth rate k "
                                      "((dV/dt)/V at the first fitted session; logistic: r).",
                       "Units": "1/day"},
    "k_mean_ci_low": {"Description": "Lower end of the interval of k_mean_per_day (as for "
                                     "beta_mean).", "Units": "1/day"},
    "k_mean_ci_high": {"Description": "Upper end of the interval of k_mean_per_day.",
                       "Units": "1/day"},
    "k_sd_per_day": {"Description": "Between-lesion SD of k.", "Units": "1/day"},
    "log_v0_mean": {"Description": "Population mean of ln(volume / mm^3) at the first fitted "
                                   "session.", "Units": "1"},
    "omega": {"Description": "Between-lesion covariance of the law's parameters (in the order "
                             "of 'parameters'), row by row, space-separated.", "Units": "mixed"},
    "parameters": {"Description": "The law's parameters, in the order of omega.", "Units": "n/a"},
    "covariance": {"Description": "Form of Omega ('full' or 'diagonal').", "Units": "n/a"},
    "n_params": {"Description": "Population parameters counted by aic: means, covariance "
                                "entries and sigma.", "Units": "1"},
    "converged": {"Description": "True when the log-likelihood change fell below tolerance.",
                  "Units": "n/a"},
    "iterations": {"Description": "Accelerated EM cycles used.", "Units": "1"},
    "confidence": {"Description": "Level of every interval.", "Units": "1"},
}

LESIONS: dict[str, dict] = {
    "subject": {"Description": "Subject label as given in the input.", "Units": "n/a"},
    "lesion": {"Description": "Lesion track number.", "Units": "n/a"},
    "phase": _PHASE,
    "model": _MODEL,
    "n_points": {"Description": "Fitted sessions of this lesion phase.", "Units": "volumes"},
    "beta": {"Description": "Individual (empirical Bayes) estimate of beta: the conditional "
                            "mode given the population estimates (power law; fixed value for "
                            "exponential and surface; n/a otherwise).", "Units": "1"},
    "beta_ci_low": {"Description": "Lower end of the individual interval: conditional "
                                   "posterior (Laplace) widened for the uncertainty of the "
                                   "population mean.", "Units": "1"},
    "beta_ci_high": {"Description": "Upper end of the individual interval.", "Units": "1"},
    "shrinkage": {"Description": "Conditional posterior variance / population variance of the "
                                 "law's shape parameter (power: beta; exponential, surface: k; "
                                 "Gompertz: c; logistic: log capacity) = prior precision / "
                                 "posterior precision: 1 = the estimate is the population's, "
                                 "0 = it is the lesion's own; 1 - shrinkage is the share of "
                                 "the lesion's own data.", "Units": "1"},
    "forecast_day": {"Description": "Day of the forecast: last fitted day + forecast_days.",
                     "Units": "day"},
    "forecast_mm3": {"Description": "Forecast volume from the individual estimate (median of "
                                    "the predictive distribution).", "Units": "mm^3"},
    "forecast_low_mm3": {"Description": "Lower end of the prediction interval (parameter "
                                        "uncertainty and residual error).", "Units": "mm^3"},
    "forecast_high_mm3": {"Description": "Upper end of the prediction interval; n/a when "
                                         "unbounded (see note).", "Units": "mm^3"},
    "note": {"Description": "How much comes from the population, forecast caveats.",
             "Units": "n/a"},
    "group": _GROUP,
    "day_start": {"Description": "First fitted day (t = 0 of the law).", "Units": "day"},
    "day_end": {"Description": "Last fitted day.", "Units": "day"},
    "v0_mm3": {"Description": "Individual estimate of the volume at day_start.", "Units": "mm^3"},
    "k_per_day": {"Description": "Individual estimate of the initial specific growth rate.",
                  "Units": "1/day"},
}

CONTRASTS: dict[str, dict] = {
    "group_a": {"Description": "First group of the pair (sorted by name).", "Units": "n/a"},
    "group_b": {"Description": "Second group of the pair.", "Units": "n/a"},
    "phase": _PHASE,
    "model": _MODEL,
    "beta_diff": {"Description": "beta_mean of group_a minus beta_mean of group_b.",
                  "Units": "1"},
    "beta_diff_ci_low": {"Description": "Lower end of the Wald interval (sum of the groups' "
                                        "subject-cluster-robust variances, t reference with "
                                        "n_subjects_a + n_subjects_b - 2 degrees of freedom).",
                         "Units": "1"},
    "beta_diff_ci_high": {"Description": "Upper end of the interval of beta_diff.", "Units": "1"},
    "p_value": {"Description": "Two-sided Wald p-value of beta_diff = 0.", "Units": "1"},
    "k_diff_per_day": {"Description": "k_mean_per_day of group_a minus that of group_b.",
                       "Units": "1/day"},
    "k_diff_ci_low": {"Description": "Lower end of the interval of k_diff_per_day.",
                      "Units": "1/day"},
    "k_diff_ci_high": {"Description": "Upper end of the interval of k_diff_per_day.",
                       "Units": "1/day"},
    "k_p_value": {"Description": "Two-sided Wald p-value of k_diff_per_day = 0.", "Units": "1"},
}

BACKTEST: dict[str, dict] = {
    "group": {"Description": "Group, or 'all' for every lesion of the run.", "Units": "n/a"},
    "method": {"Description": "How the held-out session was predicted.", "Units": "n/a",
               "Levels": {"individual": "the lesion's own least-squares fit (fits.tsv method)",
                          "population": "the lesion's estimate from the population model"}},
    "model": _MODEL,
    "n_lesions": {"Description": "Lesion phases with at least 3 fitted sessions whose last "
                                 "session was predicted (individual: only those the law could "
                                 "be fitted to without it).", "Units": "lesions"},
    "median_abs_log_error": {"Description": "Median over lesions of |ln(observed / predicted "
                                            "volume)| at the held-out session.", "Units": "1"},
    "coverage": {"Description": "Share of held-out volumes inside their prediction interval "
                                "(lesions without an interval count as outside).", "Units": "1"},
}
