"""Group fits with a shared growth exponent (pipeline.growth.group_fits)."""
from __future__ import annotations

import warnings

import numpy as np
import pandas as pd
import pytest
from scipy import integrate, optimize

from pipeline.growth import group_fits as groupfit
from pipeline.growth.group_fits import COLUMNS, fit_groups
from pipeline.settings import FitSettings


def _closed_form(v0, k, beta, t):
    # Reference: docs/methods.md §1.1, V = V0 (1 + (1 - beta) k t)^(1 / (1 - beta)),
    # k = alpha V0^(beta - 1); written with log1p so that beta within 1e-12 of 1 stays exact.
    if beta == 1.0:
        return v0 * np.exp(k * t)
    return v0 * np.exp(np.log1p((1.0 - beta) * k * t) / (1.0 - beta))


def _cohort(rng, *, n_lesions, n_sessions, beta, sigma, subject_prefix="s", group="",
            phase="untreated", lesions_per_subject=2, ode=False):
    """Simulated series: log-fold growth 0.7-3 over the window, so t* always lies beyond it."""
    rows = []
    for i in range(n_lesions):
        days = np.concatenate([[0.0], np.cumsum(rng.uniform(40, 120, n_sessions - 1))])
        span, fold, v0 = days[-1], rng.uniform(0.7, 3.0), np.exp(rng.uniform(3, 7.5))
        u = 1.0 - beta
        k = np.expm1(u * fold) / (u * span) if beta != 1.0 else fold / span
        if ode:
            # Reference: dV/dt = alpha V^beta integrated with scipy.integrate.solve_ivp
            alpha = k * v0 ** (1.0 - beta)
            sol = integrate.solve_ivp(lambda t, v, a=alpha: a * v ** beta, (0, span), [v0],
                                      t_eval=days, rtol=1e-10, atol=1e-12)
            volume = sol.y[0]
        else:
            volume = _closed_form(v0, k, beta, days)
        volume = volume * np.exp(rng.normal(0.0, sigma, n_sessions))
        subject = f"{subject_prefix}{i // lesions_per_subject:03d}"
        rows += [dict(subject=subject, lesion=i % lesions_per_subject + 1, day=float(d),
                      volume_mm3=float(v), phase=phase, in_fit=True, group=group)
                 for d, v in zip(days, volume)]
    return pd.DataFrame(rows)


def test_recovers_shared_beta_from_ode_series():
    # Reference: series from scipy.integrate.solve_ivp of dV/dt = alpha V^beta (not the closed
    # form the fitter uses); the known beta must fall inside the reported interval.
    rng = np.random.default_rng(11)
    table = _cohort(rng, n_lesions=60, n_sessions=5, beta=0.7, sigma=0.05, ode=True)
    fit = fit_groups(table).iloc[0]
    assert fit.status == "ok" and fit.note == ""
    assert (fit.n_lesions, fit.n_points, fit.n_subjects, fit.dof) == (60, 300, 30, 300 - 121)
    assert fit.beta_ci_low < 0.7 < fit.beta_ci_high
    assert abs(fit.beta - 0.7) < 0.1
    assert fit.sigma_log == pytest.approx(0.05, rel=0.25)
    assert fit.n_singular == 0 and fit.ci_method == "F"


@pytest.mark.parametrize("beta", [1.0, 1.0 + 1e-12, 0.5, 1.6])
def test_noise_free_series_give_beta_exactly(beta):
    # Reference: closed form (docs/methods.md §1.1); also the beta -> 1 limit through log1p.
    rng = np.random.default_rng(3)
    table = _cohort(rng, n_lesions=12, n_sessions=4, beta=beta, sigma=0.0)
    fit = fit_groups(table).iloc[0]
    assert fit.beta == pytest.approx(beta, abs=1e-5)
    assert fit.rss_log < 1e-12


def test_profile_interval_coverage_by_simulation():
    # Reference: definition of a 95 % confidence interval, checked by Monte Carlo; the issue asks
    # for 90-98 % coverage. 300 repeats of 8 lesions x 4 sessions, sigma 0.1, beta 0.8.
    rng = np.random.default_rng(2024)
    covered = 0
    for _ in range(300):
        fit = fit_groups(_cohort(rng, n_lesions=8, n_sessions=4, beta=0.8, sigma=0.1)).iloc[0]
        covered += bool(fit.beta_ci_low <= 0.8 <= fit.beta_ci_high)
    assert 0.90 <= covered / 300 <= 0.98


def _internal_cohort(table):
    rows, _ = groupfit._usable_rows(table)
    return groupfit._cohort(rows)


def test_sparse_jacobian_matches_dense_and_nested_curve_fit():
    rng = np.random.default_rng(5)
    table = _cohort(rng, n_lesions=6, n_sessions=5, beta=1.3, sigma=0.08)
    cohort = _internal_cohort(table)
    options = groupfit._resolve(FitSettings(), None, None)
    b0, kappa0, log_v0 = groupfit._start(cohort, options)
    sparse_fit = groupfit._joint_fit(cohort, log_v0, kappa0, b0, options.bounds)
    dense_fit = groupfit._joint_fit(cohort, log_v0, kappa0, b0, options.bounds, sparse_jac=False)
    assert sparse_fit.x[-1] == pytest.approx(dense_fit.x[-1], abs=1e-6)
    assert sparse_fit.cost == pytest.approx(dense_fit.cost, rel=1e-8)

    # Reference: an independent nested fit - scipy.optimize.curve_fit per lesion at fixed beta
    # (k bounded below the singularity, t* > last day), summed, minimised over beta with
    # scipy.optimize.minimize_scalar.
    def rss_at(beta):
        total = 0.0
        for (_, _), one in table.groupby(["subject", "lesion"]):
            t = one.day.to_numpy() - one.day.min()
            y = np.log(one.volume_mm3.to_numpy())

            def model(t, log_v0, k):
                return log_v0 + np.log1p((1 - beta) * k * t) / (1 - beta)
            k_max = (1 - 1e-9) / ((beta - 1) * t[-1])
            k0 = min((y[-1] - y[0]) / t[-1], 0.5 * k_max)
            with warnings.catch_warnings():
                warnings.simplefilter("ignore", optimize.OptimizeWarning)
                p, _ = optimize.curve_fit(model, t, y, p0=[y[0], k0],
                                          bounds=([-np.inf, -np.inf], [np.inf, k_max]))
            total += float(np.sum((y - model(t, *p)) ** 2))
        return total
    nested = optimize.minimize_scalar(rss_at, bounds=(1.0001, 1.8), method="bounded",
                                      options={"xatol": 1e-7})
    assert sparse_fit.x[-1] == pytest.approx(nested.x, abs=1e-4)
    assert 2 * sparse_fit.cost == pytest.approx(nested.fun, rel=1e-6)
    assert fit_groups(table).beta.iloc[0] == pytest.approx(nested.x, abs=1e-4)


def test_log_growth_is_finite_and_continuous_past_the_singularity():
    # Reference: docs/methods.md §1.1/§1.8, t* = 1 / ((beta - 1) k); the model must stay finite so
    # the
    # solver can step back, and be continuous where the linear continuation starts.
    tau = np.linspace(0.0, 1.0, 11)
    g, _ = groupfit._log_growth(tau, np.array(3.0), 1.5)  # t* = 1 / (0.5 * 3) = 2/3 < 1
    assert np.isfinite(g).all() and np.all(np.diff(g) > 0)
    z_floor = groupfit._Z_FLOOR
    kappa_at_floor = (1 - z_floor) / 0.5
    # neighbouring floats on either side of the switch: z moves by ~1e-16, i.e. 1e-7 of the floor
    kappas = np.array([np.nextafter(kappa_at_floor, 0), np.nextafter(kappa_at_floor, 10)])
    sides, _ = groupfit._log_growth(np.ones(2), kappas, 1.5)
    assert sides[1] >= sides[0] and sides[1] - sides[0] < 1e-5


def test_no_singularity_inside_any_window_near_blow_up():
    # Reference: docs/methods.md §1.8 - a fit is valid only when t* lies after the fitted window.
    # Lesions whose true t* lies just 3-10 % after their last session.
    rng = np.random.default_rng(8)
    rows = []
    for i in range(10):
        days = np.array([0.0, 50.0, 100.0, 150.0])
        t_star = days[-1] * rng.uniform(1.03, 1.10)
        k = 1.0 / (0.5 * t_star)  # beta 1.5
        volume = _closed_form(100.0, k, 1.5, days) * np.exp(rng.normal(0, 0.02, 4))
        rows += [dict(subject=f"s{i}", lesion=1, day=d, volume_mm3=v, phase="untreated",
                      in_fit=True) for d, v in zip(days, volume)]
    table = pd.DataFrame(rows)
    fit = fit_groups(table).iloc[0]
    assert fit.status == "ok" and fit.n_singular == 0
    cohort = _internal_cohort(table)
    beta, kappa, _, problems = groupfit._solve(cohort, groupfit._resolve(FitSettings(), None,
                                                                         None))
    assert problems == []
    t_star_days = cohort.span / ((beta - 1.0) * kappa)
    assert np.all(t_star_days > cohort.span)  # time runs from each lesion's first day
    assert beta == pytest.approx(1.5, abs=0.15)


def test_profile_at_fixed_beta_keeps_kappa_feasible():
    # Data from a steep blow-up, profiled at a beta far above it: kappa must stay below
    # 1 / (beta - 1) (no singularity inside the window) instead of jumping past it.
    rng = np.random.default_rng(1)
    table = _cohort(rng, n_lesions=5, n_sessions=5, beta=2.5, sigma=0.05)
    cohort = _internal_cohort(table)
    rss, kappa, log_v0 = groupfit._profile(cohort, 2.9, np.zeros(5))
    assert np.isfinite(rss) and np.isfinite(log_v0).all()
    assert np.all((2.9 - 1.0) * kappa < 1.0)


def test_group_and_phase_selection_rules():
    rng = np.random.default_rng(4)
    a = _cohort(rng, n_lesions=4, n_sessions=4, beta=0.9, sigma=0.05, subject_prefix="a",
                group="")
    b = _cohort(rng, n_lesions=4, n_sessions=4, beta=0.9, sigma=0.05, subject_prefix="b",
                group="armB")
    c = _cohort(rng, n_lesions=3, n_sessions=3, beta=0.9, sigma=0.05, subject_prefix="c",
                group="armB", phase="after-radiosurgery")
    short = c.copy()
    short["subject"] = "d000"
    short = short[short.lesion == 1].iloc[:2]  # 2 sessions: too few, left out
    c = pd.concat([c, short])
    table = pd.concat([a, b, c], ignore_index=True)
    # rows that must not enter: not in_fit (a wild volume), merged (NaN volume)
    extra = table.iloc[[0, 5]].copy()
    extra["day"] = [900.0, 950.0]
    extra["volume_mm3"] = [1e9, np.nan]
    extra["in_fit"] = False
    with_extra = pd.concat([table, extra], ignore_index=True)
    fits = fit_groups(with_extra).set_index(["group", "phase"])
    assert sorted(fits.index) == [("all", "untreated"), ("armB", "after-radiosurgery"),
                                  ("armB", "untreated")]
    assert fits.loc[("all", "untreated"), "n_lesions"] == 4
    assert fits.loc[("armB", "untreated"), "n_points"] == 16
    phase_fit = fits.loc[("armB", "after-radiosurgery")]
    assert (phase_fit.n_lesions, phase_fit.n_points, phase_fit.n_subjects) == (3, 9, 2)
    assert "1 lesion(s) with fewer than 3 fitted sessions" in phase_fit.note
    clean = fit_groups(table).set_index(["group", "phase"])
    assert np.allclose(fits.beta.to_numpy(float), clean.beta.to_numpy(float), equal_nan=True)


def test_phase_without_qualifying_lesions_is_reported():
    table = pd.DataFrame(dict(subject="s1", lesion=1, day=[0.0, 30.0], volume_mm3=[10.0, 12.0],
                              phase="untreated", in_fit=True, group="x"))
    fit = fit_groups(table).iloc[0]
    assert (fit.group, fit.status, fit.n_lesions) == ("x", "no-lesions", 0)
    assert np.isnan(fit.beta)


def test_single_exact_lesion_has_no_interval_unless_error_is_known():
    # Reference: docs/methods.md, check value C9 - (1, 4, 9) at t = 0, 1, 2 is solved exactly by
    # beta = 0.5.
    table = pd.DataFrame(dict(subject="s1", lesion=1, day=[0.0, 1.0, 2.0],
                              volume_mm3=[1.0, 4.0, 9.0], phase="untreated", in_fit=True))
    fit = fit_groups(table).iloc[0]
    assert fit.status == "exact" and fit.dof == 0
    assert fit.beta == pytest.approx(0.5, abs=1e-6)
    assert np.isnan(fit.beta_ci_low) and np.isnan(fit.beta_ci_high)
    known = fit_groups(table, settings=FitSettings(measurement_error=0.05)).iloc[0]
    assert known.ci_method == "chi2"
    assert known.beta_ci_low < 0.5 < known.beta_ci_high


def test_beta_is_unit_free_and_time_origin_free():
    # Reference: docs/methods.md §1.1 and check value C14 - rescaling volumes (mm^3 -> mL) leaves
    # beta unchanged;
    # the law is autonomous, so shifting every day leaves it unchanged too.
    rng = np.random.default_rng(9)
    table = _cohort(rng, n_lesions=10, n_sessions=5, beta=1.2, sigma=0.1)
    moved = table.assign(volume_mm3=table.volume_mm3 * 1e-3, day=table.day + 365.0)
    first, second = fit_groups(table).iloc[0], fit_groups(moved).iloc[0]
    assert second.beta == pytest.approx(first.beta, abs=1e-6)
    assert second.beta_ci_high == pytest.approx(first.beta_ci_high, abs=1e-5)
    assert second.rss_log == pytest.approx(first.rss_log, rel=1e-8)


def test_interval_reported_unbounded_when_data_cannot_pin_beta():
    # Nearly flat series: the profile stays under the F threshold across the whole box.
    table = pd.DataFrame(dict(subject=["s1"] * 4 + ["s2"] * 4, lesion=1,
                              day=[0.0, 30, 60, 90] * 2,
                              volume_mm3=[100, 101, 99, 100, 50, 52, 51, 50.5],
                              phase="untreated", in_fit=True))
    fit = fit_groups(table).iloc[0]
    assert np.isnan(fit.beta_ci_low) or np.isnan(fit.beta_ci_high)
    assert "unbounded" in fit.note


def test_refuses_table_without_phases():
    with pytest.raises(ValueError, match=r"lacks columns \['phase', 'in_fit'\]"):
        fit_groups(pd.DataFrame(dict(subject=["s"], lesion=[1], day=[0.0], volume_mm3=[1.0])))


def test_bad_bounds_are_refused():
    table = _cohort(np.random.default_rng(0), n_lesions=2, n_sessions=3, beta=1, sigma=0.1)
    with pytest.raises(ValueError, match="low < 1 < high"):
        fit_groups(table, beta_bounds=(1.2, 3.0))


def test_every_output_column_is_documented():
    rng = np.random.default_rng(0)
    out = fit_groups(_cohort(rng, n_lesions=3, n_sessions=4, beta=1.0, sigma=0.1))
    assert set(out.columns) <= set(COLUMNS)
    assert list(out.columns[:8]) == ["group", "phase", "model", "n_lesions", "n_points", "beta",
                                     "beta_ci_low", "beta_ci_high"]


def test_beta_bounds_from_settings_and_at_bound_status():
    rng = np.random.default_rng(12)
    table = _cohort(rng, n_lesions=10, n_sessions=5, beta=2.2, sigma=0.02)
    fit = fit_groups(table, settings=FitSettings(beta_bounds=(-1.0, 1.5))).iloc[0]
    assert fit.status == "at-bound" and fit.beta == pytest.approx(1.5, abs=1e-6)
    assert "beta at its bound" in fit.note
    free = fit_groups(table).iloc[0]
    assert free.status == "ok" and free.beta_ci_low < 2.2 < free.beta_ci_high


def test_lesions_without_change_do_not_narrow_the_interval():
    # Reference: a series with the same volume at every session is fitted exactly by k = 0 at
    # every beta (closed form, docs/methods.md §1.1), so it carries no information on beta; the
    # interval must stay that of the informative lesion alone. beta of that lesion is checked
    # against scipy.optimize.least_squares on the closed form (an independent fit).
    days = np.array([0.0, 30, 60, 90, 120])
    volume = 100 * (1 + 0.01 * days) ** 1.4 * np.exp([0, .05, -.05, .04, 0])
    grow = pd.DataFrame(dict(subject="g", lesion=1, day=days, volume_mm3=volume,
                             phase="untreated", in_fit=True))
    flat = pd.concat([grow.assign(subject=f"c{i}", volume_mm3=500.0) for i in range(5)])
    alone, mixed = fit_groups(grow).iloc[0], fit_groups(pd.concat([grow, flat])).iloc[0]
    for name in ("beta", "beta_ci_high", "dof", "sigma_log", "n_lesions", "n_points"):
        assert mixed[name] == pytest.approx(alone[name], rel=1e-9, nan_ok=True), name
    assert np.isnan(alone.beta_ci_low) and np.isnan(mixed.beta_ci_low)
    assert "5 lesion(s) with the same volume at every fitted session left out" in mixed.note

    def residuals(p):
        return np.log(_closed_form(np.exp(p[0]), p[1], p[2], days)) - np.log(volume)
    reference = optimize.least_squares(residuals, [np.log(100), 0.01, 0.5],
                                       bounds=([-np.inf, -2, -1], [np.inf, 2, 3]))
    assert mixed.beta == pytest.approx(reference.x[2], abs=1e-3)
    only_flat = fit_groups(flat).iloc[0]
    assert only_flat.status == "no-lesions" and "same volume" in only_flat.note
