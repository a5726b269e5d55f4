"""Per-lesion fitting: recovery, interval coverage, exact fits, derived figures, batch behaviour."""
import numpy as np
import pandas as pd
import pytest
from scipy import stats
from scipy.optimize import least_squares

from pipeline.growth import lesion_fits as growth
from pipeline.growth.lesion_fits import fit_lesions, fit_series
from pipeline.growth.solvers import power_profile
from pipeline.growth.fit_table import COLUMNS, aicc
from pipeline.growth.laws import LAWS
from pipeline.settings import FitSettings

CONTRACT = "subject lesion phase model n_points day_start day_end v0_mm3 alpha beta " \
           "beta_ci_low beta_ci_high aicc note".split()


def _phased(days, volumes, lesion=1, subject="01", phase="untreated"):
    return pd.DataFrame({"subject": subject, "lesion": lesion, "phase": phase,
                         "day": np.asarray(days, float), "volume_mm3": np.asarray(volumes, float),
                         "in_fit": True, "fit_exclusion": "", "group": ""})


def _simulate(rng, m, n, beta, sigma, fold=10.0, span=300.0):
    """Power-law series with log-normal noise; k chosen for a given fold change (no singularity)."""
    t = np.tile(np.linspace(0.0, span, n), (m, 1))
    u = 1.0 - beta
    k = np.expm1(u * np.log(fold)) / (u * span) if u != 0 else np.log(fold) / span
    theta = np.tile([np.log(200.0), k, beta], (m, 1))
    y = LAWS["power"].log_volume(t, theta) + sigma * rng.standard_normal((m, n))
    return t, y


def test_profile_thresholds_are_the_c17_quantiles():
    # Reference: docs/methods.md, check value C17 (F and chi-square quantiles, recomputed there
    # with scipy.stats). The group fit's profile interval compares the RSS excess with
    # F(0.95; 1, dof) when sigma is estimated and with chi2(0.95; 1) when it is known.
    from pipeline.growth.group_fits import _Options, _reference

    estimated = _Options((-1.0, 3.0), 0.95, 0.0, 2.0)
    for dof, value in [(1, 161.448), (2, 18.513), (3, 10.128), (4, 7.709)]:
        scale, threshold, method = _reference(2.0 * dof, dof, estimated)
        assert (scale, method) == (2.0, "F") and threshold == pytest.approx(value, abs=1e-3)
    known = _Options((-1.0, 3.0), 0.95, 0.1, 2.0)
    scale, threshold, method = _reference(5.0, 3, known)
    assert method == "chi2" and scale == pytest.approx(0.01)
    assert threshold == pytest.approx(3.841459, abs=1e-6)


def test_aicc_c18():
    # Reference: docs/methods.md, check value C18: correction 2k(k+1)/(n-k-1); k = 4 undefined for n
    # <= 5,
    # +40 at n = 6, +8 at n = 10; k = 3: +24 at n = 5, undefined at n = 4.
    rss = np.array([0.3])
    for n, p, corr in [(6, 3, 40.0), (10, 3, 8.0), (5, 2, 24.0)]:
        k = p + 1
        assert aicc(rss, n, p, 0.0)[0] == pytest.approx(n * np.log(0.3 / n) + 2 * k + corr)
    assert np.isnan(aicc(rss, 5, 3, 0.0)[0]) and np.isnan(aicc(rss, 4, 2, 0.0)[0])


def test_profile_endpoints_sit_on_the_f_threshold():
    # Reference: profile-likelihood interval {b: (RSS(b) - RSS_min)/(RSS_min/(n-p)) <= F(1,n-p)}
    # (Bates and Watts 1988; docs/methods.md §1.6); RSS_min checked against scipy least_squares.
    rng = np.random.default_rng(3)
    t, y = _simulate(rng, 5, 7, 0.8, 0.08, fold=30.0)
    out = fit_series(LAWS["power"], t, y)
    law = LAWS["power"]
    for i in range(5):
        ti, yi = t[i:i + 1], y[i]
        ref = least_squares(lambda th, ti=ti, yi=yi: law.log_volume(ti, th[None])[0] - yi,
                            out["theta"][i], method="lm")
        assert out["rss"][i] == pytest.approx(2 * ref.cost, rel=1e-6)
    threshold = out["rss"] * (1 + stats.f.ppf(0.95, 1, 4) / 4)
    for key in ("beta_ci_low", "beta_ci_high"):
        b = out[key]
        ok = np.isfinite(b)
        assert ok.any()
        prof = power_profile(t[ok], y[ok], b[ok, None], k_max=2.0)[0][:, 0]
        np.testing.assert_allclose(prof, threshold[ok], rtol=1e-4)


@pytest.mark.parametrize("beta,sigma_cfg", [(0.7, 0.0), (1.2, 0.0), (0.7, 0.1)])
def test_recovery_and_coverage_by_simulation(beta, sigma_cfg):
    # Reference: coverage by simulation (common practice; issue 4 asks for 90-98 % of repeats
    # at nominal 95 %). 300 repeats of a 6-session series, 20-fold growth, 10 % log-normal noise;
    # F-based (error unknown) and chi-square (error configured) profile intervals.
    rng = np.random.default_rng(11)
    repeats = 300
    t, y = _simulate(rng, repeats, 6, beta, 0.1, fold=20.0)
    out = fit_series(LAWS["power"], t, y, settings=FitSettings(measurement_error=sigma_cfg))
    beta_hat = out["theta"][:, 2]
    assert abs(np.median(beta_hat) - beta) < 0.05              # recovery (median of 300)
    low = np.nan_to_num(out["beta_ci_low"], nan=-np.inf)
    high = np.nan_to_num(out["beta_ci_high"], nan=np.inf)
    coverage = np.mean((low <= beta) & (beta <= high))
    assert 0.90 <= coverage <= 0.98, coverage


def test_exact_fit_has_no_interval_unless_sigma_known():
    # Reference: docs/methods.md §1.5 (n = p: zero residual dof) and check value C15
    # (ill-conditioning).
    phased = _phased([0, 90, 180], [100, 135, 225])
    fits = fit_lesions(phased, settings=FitSettings(models=("power",)))
    row = fits.iloc[0]
    assert row["status"] == "exact" and row["beta"] == pytest.approx(2.343, abs=6e-4)
    assert np.isnan(row["beta_ci_low"]) and np.isnan(row["beta_ci_high"])
    assert "zero residual dof" in row["note"]
    known = fit_lesions(phased, settings=FitSettings(models=("power",), measurement_error=0.1))
    r = known.iloc[0]
    assert r["ci_method"] == "profile-chi2"
    assert "not pinned down" in r["note"]       # +-10 % noise on 1.5-fold growth: hopeless


def test_no_exact_solution_is_reported():
    fits = fit_lesions(_phased([0, 10, 20], [100, 300, 200]),
                       settings=FitSettings(models=("power",)))
    assert fits["status"].iloc[0] == "no-exact-solution"
    assert "no exact 3-point solution" in fits["note"].iloc[0]


def test_singularity_rule():
    # Reference: docs/methods.md §1.8: a beta > 1 fit is valid only if t* = 1/((b-1)k) lies after
    # the
    # fitted window; C3 series (b = 2, a = 0.25, V0 = 1) has t* = 4.
    days = [0.0, 1.0, 2.0, 3.0, 3.5]
    vols = [1.0 / (1.0 - 0.25 * d) for d in days]
    fits = fit_lesions(_phased(days, vols), settings=FitSettings(models=("power",),
                                                                  forecast_days=10.0))
    row = fits.iloc[0]
    assert row["beta"] == pytest.approx(2.0, abs=1e-5)
    assert row["singularity_day"] == pytest.approx(4.0, rel=1e-5)
    assert row["singularity_day"] > row["day_end"]
    assert np.isnan(row["forecast_mm3"]) and "singularity" in row["note"]


def test_doubling_time_and_sgr_c7():
    # Reference: docs/methods.md, check value C7 (Schwartz 1961 VDT; Mehrara et al. 2007 SGR =
    # ln2/DT):
    # 100 -> 200 mm^3 in 100 d: VDT = 100 d, SGR = 0.693147 %/day; +25 % in 90 d: VDT 279.566 d.
    phased = pd.concat([_phased([0, 100], [100, 200], lesion=1),
                        _phased([0, 90], [100, 125], lesion=2)], ignore_index=True)
    fits = fit_lesions(phased, settings=FitSettings(models=("exponential",)))
    assert fits["doubling_time_days"].tolist() == pytest.approx([100.0, 279.566], abs=1e-3)
    assert fits["sgr_per_day"].iloc[0] * 100 == pytest.approx(0.693147, abs=1e-6)
    np.testing.assert_allclose(fits["doubling_time_days"], np.log(2) / fits["sgr_per_day"])
    assert (fits["status"] == "exact").all()


def test_unit_invariance_c14():
    # Reference: docs/methods.md, check value C14: refitting in mL leaves beta unchanged and
    # multiplies alpha
    # by 1e-3^(1-b); b = 1.25, a = 0.01 -> 0.0562341 in mL.
    assert 0.01 * 1e-3 ** (1 - 1.25) == pytest.approx(0.0562341, rel=1e-6)
    rng = np.random.default_rng(5)
    t, y = _simulate(rng, 1, 6, 1.25, 0.05, fold=8.0)
    days, mm3 = t[0], np.exp(y[0])
    a = fit_lesions(_phased(days, mm3), settings=FitSettings(models=("power",)))
    b = fit_lesions(_phased(days, mm3 * 1e-3), settings=FitSettings(models=("power",)))
    for col in ("beta", "beta_ci_low", "beta_ci_high", "k_per_day"):
        assert b[col].iloc[0] == pytest.approx(a[col].iloc[0], rel=1e-6, abs=1e-8)
    beta = a["beta"].iloc[0]
    assert b["alpha"].iloc[0] == pytest.approx(a["alpha"].iloc[0] * 1e-3 ** (1 - beta), rel=1e-5)


def test_exponential_data_give_beta_one_c6():
    # Reference: docs/methods.md, check value C6: V = 1, 2, 4 at t = 0, 1, 2 -> b = 1, a = ln 2.
    fits = fit_lesions(_phased([0, 1, 2], [1, 2, 4]), settings=FitSettings(models=("power",)))
    assert fits["beta"].iloc[0] == pytest.approx(1.0, abs=1e-9)
    assert fits["alpha"].iloc[0] == pytest.approx(np.log(2), rel=1e-9)


def test_rows_best_weights_and_too_few_points():
    # Reference: docs/outputs.md §4.7 (fits.tsv): a law needs as many sessions as parameters;
    # best = lowest AICc; Akaike weights sum to 1 (Burnham and Anderson 2002).
    rng = np.random.default_rng(2)
    t, y = _simulate(rng, 1, 9, 0.8, 0.05, fold=20.0)
    phased = pd.concat([_phased(t[0], np.exp(y[0]), lesion=1),
                        _phased([0, 50], [10, 20], lesion=2),
                        _phased([0], [10], lesion=3)], ignore_index=True)
    fits = fit_lesions(phased)
    assert list(fits.columns[:len(CONTRACT)]) == CONTRACT
    assert set(fits.columns) <= set(COLUMNS)
    one = fits[fits.lesion == 1]
    assert len(one) == 5 and one["akaike_weight"].sum() == pytest.approx(1.0)
    assert one.loc[one["best"], "aicc"].iloc[0] == one["aicc"].min()
    two = fits[fits.lesion == 2]
    assert sorted(two["model"]) == ["exponential", "surface"] and two["best"].sum() == 1
    assert "power needs 3" in two.loc[two["best"], "note"].iloc[0]
    three = fits[fits.lesion == 3]
    assert three["model"].tolist() == ["none"] and three["status"].iloc[0] == "not-fitted"
    assert (fits["group"] == "all").all()


def test_failed_fit_is_a_row_not_an_exception(monkeypatch):
    real = growth.fit_series

    def flaky(law, t, y, *, settings):
        if law.name == "logistic":
            raise ValueError("simulated breakdown")
        return real(law, t, y, settings=settings)

    monkeypatch.setattr(growth, "fit_series", flaky)
    fits = fit_lesions(_phased([0, 10, 20, 30], [10, 14, 19, 30]))
    bad = fits[fits.model == "logistic"].iloc[0]
    assert bad["status"] == "failed" and "simulated breakdown" in bad["note"]
    assert not bad["best"] and (fits["status"] != "failed").sum() == 4


def test_bootstrap_and_forecast_interval():
    # Reference: parametric bootstrap from the error model (Efron and Tibshirani 1993;
    # docs/methods.md §1.6): the percentile interval brackets the estimate; the forecast interval
    # brackets the forecast.
    rng = np.random.default_rng(8)
    t, y = _simulate(rng, 1, 6, 0.9, 0.05, fold=10.0)
    fits = fit_lesions(_phased(t[0], np.exp(y[0])),
                       settings=FitSettings(models=("power",), bootstrap=200, seed=1))
    r = fits.iloc[0]
    assert r["beta_boot_low"] < r["beta"] < r["beta_boot_high"]
    assert r["forecast_low_mm3"] < r["forecast_mm3"] < r["forecast_high_mm3"]
    assert r["forecast_day"] == pytest.approx(r["day_end"] + 90.0)


def test_an_exact_fit_is_never_beaten_by_a_law_with_a_positive_residual():
    # Reference: AICc = n ln(RSS/n) + 2k + 2k(k+1)/(n-k-1) (Hurvich and Tsai 1989; Burnham and
    # Anderson 2002) tends to -infinity as RSS -> 0 with n > k + 1, so a law fitting exactly
    # with residual dof beats every law with RSS > 0. The data are exactly exponential:
    # numpy.polyfit (an independent linear least-squares fit of ln V on t) leaves no residual.
    days = np.array([0.0, 30, 60, 90, 120])
    volumes = 100.0 * np.exp(0.01 * days)
    residual = np.polyfit(days, np.log(volumes), 1, full=True)[1]
    assert residual.size == 0 or residual[0] < 1e-20
    fits = fit_lesions(_phased(days, volumes)).set_index("model")
    assert fits["best"].sum() == 1 and fits.loc["exponential", "best"]
    assert fits.loc["surface", "sigma_log"] > 0.01            # the law that used to win
    assert fits["akaike_weight"].isna().all()
    note = fits.loc["exponential", "note"]
    assert "fits exactly" in note and "surface" in note and "power" in note


def test_a_zero_residual_with_more_parameters_wins_over_positive_residuals():
    # Reference: closed form of dV/dt = alpha V^beta, V = V0 (1 + (1 - beta) k t)^(1/(1-beta))
    # (docs/methods.md §1.1): six noise-free points fit the power law exactly; AICc as above.
    days = np.arange(6) * 30.0
    fits = fit_lesions(_phased(days, 50 * (1 + 0.02 * days) ** 1.5)).set_index("model")
    assert fits.loc["power", "best"] and fits["best"].sum() == 1
    assert fits.loc["power", "beta"] == pytest.approx(1 - 1 / 1.5, abs=1e-6)   # 1/(1-b) = 1.5
    assert np.isnan(fits.loc["power", "aicc"]) and "fits exactly" in fits.loc["power", "note"]


def test_laws_without_aicc_are_named_when_others_are_compared():
    # Reference: docs/methods.md, check value C18: with sigma estimated k = p + 1, so AICc is
    # undefined for the
    # 3-parameter laws (k = 4) at n = 5 and defined for the 2-parameter laws (k = 3).
    rng = np.random.default_rng(4)
    t, y = _simulate(rng, 1, 5, 0.8, 0.1, fold=8.0)
    fits = fit_lesions(_phased(t[0], np.exp(y[0]))).set_index("model")
    best = fits[fits["best"]].iloc[0]
    assert best.name in ("exponential", "surface")
    assert "not compared by AICc" in best["note"]
    for name in ("power", "gompertz", "logistic"):
        assert np.isnan(fits.loc[name, "aicc"]) and name in best["note"]


def test_forecast_overflow_is_n_a_with_a_note_and_never_inf_in_a_table(tmp_path):
    # Reference: IEEE 754 double range, exp(x) overflows for x > ln(max double) ~ 709.78
    # (numpy.finfo); here ln V at the forecast day is ln 50 + 0.4 (150 + 1826) ~ 794.
    from pipeline.io.tsv import write_table

    assert np.log(np.finfo(float).max) == pytest.approx(709.78, abs=0.01)
    days = np.arange(6) * 30.0
    volumes = 50 * np.exp(0.4 * days) * np.exp([0, .1, -.1, .1, -.1, 0])
    fits = fit_lesions(_phased(days, volumes), settings=FitSettings(
        models=("exponential",), max_rate_per_day=2.0, forecast_days=1826.0))
    row = fits.iloc[0]
    assert np.isnan(row["forecast_mm3"]) and np.isnan(row["forecast_high_mm3"])
    assert "forecast overflows" in row["note"]
    write_table(fits, tmp_path / "fits.tsv")
    cells = {c for line in (tmp_path / "fits.tsv").read_text().splitlines()[1:]
             for c in line.split("\t")}
    assert not cells & {"inf", "-inf", "nan", "NaN"}


def test_implausible_forecast_is_flagged():
    # Reference: adult intracranial volume is about 1.2-1.7 litres (from memory); a forecast
    # above 2e6 mm^3 cannot be a brain lesion. Exponential growth 0.05/day from 50 mm^3 over
    # 150 + 1000 days: 50 exp(57.5) mm^3 (closed form of dV/dt = k V).
    days = np.arange(6) * 30.0
    fits = fit_lesions(_phased(days, 50 * np.exp(0.05 * days) * np.exp([0, .05, -.05, 0, .05, 0])),
                       settings=FitSettings(models=("exponential",), forecast_days=1000.0))
    row = fits.iloc[0]
    assert row["forecast_mm3"] == pytest.approx(50 * np.exp(0.05 * 1150), rel=0.2)
    assert "more than a skull holds" in row["note"]


@pytest.mark.parametrize("horizon", [float("inf"), float("nan"), 3650.0, -1.0])
def test_forecast_horizon_is_bounded(horizon):
    with pytest.raises(ValueError, match="forecast_days must be (between 0 and 1826|a finite)"):
        FitSettings(forecast_days=horizon)


def test_a_law_named_twice_is_refused():
    with pytest.raises(ValueError, match="more than once"):
        FitSettings(models=("power", "exponential", "power"))


def test_counts_print_as_integers_also_when_nothing_is_fitted(tmp_path):
    # Reference: BIDS tabular files (common practice): a count is written as an integer.
    from pipeline.api import fit_growth
    from pipeline.io.tsv import write_table

    longitudinal = pd.DataFrame({"subject": "01", "lesion": 1, "session": ["a", "b"],
                                 "day": [0.0, 30.0], "volume_mm3": [5.0, 0.0],
                                 "status": "present"})
    _, _, unfitted = fit_growth(longitudinal)
    write_table(unfitted, tmp_path / "unfitted.tsv")
    header, line = (tmp_path / "unfitted.tsv").read_text().splitlines()
    assert dict(zip(header.split("\t"), line.split("\t")))["n_points"] == "1"


def test_beta_of_a_lesion_without_change_is_n_a():
    # Reference: closed form V = V0 (1 + (1 - beta) k t)^(1/(1-beta)) (docs/methods.md §1.1) is
    # constant for k = 0 whatever beta, so beta is not identifiable from a constant series.
    fits = fit_lesions(_phased([0, 30, 60, 90, 120], [500.0] * 5)).set_index("model")
    assert np.isnan(fits.loc["power", "beta"]) and np.isnan(fits.loc["power", "beta_ci_low"])
    assert "any beta fits" in fits.loc["power", "note"]
    assert fits.loc["exponential", "best"]                  # exact, fewest parameters


@pytest.mark.parametrize("field", ["measurement_error", "max_rate_per_day", "detection_limit_mm3"])
def test_non_finite_fit_settings_are_refused(field):
    with pytest.raises(ValueError, match=f"{field} must be a finite number"):
        FitSettings(**{field: float("inf")})
    with pytest.raises(ValueError, match="beta_bounds"):
        FitSettings(beta_bounds=(-float("inf"), 3.0))
