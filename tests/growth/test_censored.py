"""Left-censored sessions (lesion not seen after an event) in the whole-phase response fits."""
import numpy as np
import pandas as pd
import pytest
from scipy import stats

from pipeline.api import fit_growth
from pipeline.growth.censored import censored_loglik, fit_censored
from pipeline.growth.laws import LAWS
from pipeline.settings import FitSettings

RR = LAWS["regression_regrowth"]


def test_censored_likelihood_equals_scipy_stats_by_hand():
    # Reference: scipy.stats.norm (logpdf of the seen ln-volumes, logcdf of the limit for the
    # censored ones), the censored normal likelihood; hand-sized example, invented numbers
    y = np.array([6.0, 5.1, 0.0, 4.4])
    fitted = np.array([5.9, 5.0, 3.2, 4.6])
    censored = np.array([False, False, True, False])
    sigma, log_limit = 0.15, np.log(30.0)
    expected = (stats.norm.logpdf([6.0, 5.1, 4.4], loc=[5.9, 5.0, 4.6], scale=sigma).sum()
                + stats.norm.logcdf(log_limit, loc=3.2, scale=sigma))
    assert censored_loglik(y, fitted, censored, log_limit, sigma) == pytest.approx(expected,
                                                                                   rel=1e-12)
    # no censored point: the ordinary normal log-likelihood
    none = np.zeros(4, bool)
    assert censored_loglik(y, fitted, none, log_limit, sigma) == pytest.approx(
        stats.norm.logpdf(y, loc=fitted, scale=sigma).sum(), rel=1e-12)


def _course(days, truth):
    return np.exp(RR.log_volume(np.asarray(days)[None, :] - days[0], truth[None, :])[0])


def test_censored_fit_uses_the_unseen_sessions():
    # invented complete response and slow regrowth: V_s = 2000, d = 0.2, g = 0.0005 (the curve
    # falls to 1.8 % of V_s); sessions below 100 mm^3 are not seen
    days = np.array([0.0, 30, 60, 90, 120, 150, 180, 210, 240])
    truth = np.array([np.log(2000.0), 0.2, 0.0005])
    v = _course(days, truth)
    unseen = v < 100.0
    assert unseen.tolist() == [False, True, True, True] + [False] * 5
    y = np.where(unseen, 0.0, np.log(v))
    settings = FitSettings(measurement_error=0.02)
    fit = fit_censored(RR, days, y, unseen, np.log(100.0), settings=settings)
    assert fit["ok"]
    # the seen sessions pin V_s and g; the unseen ones only bound d from below (any faster
    # decay is as likely), so the curve must lie below the limit there
    assert fit["theta"][0] == pytest.approx(truth[0], abs=0.05)
    assert fit["theta"][2] == pytest.approx(truth[2], rel=0.05)
    curve = _course(days, np.asarray(fit["theta"]))
    assert (curve[unseen] < 100.0).all() and fit["theta"][1] > 0.05


def test_whole_phase_rows_enter_absent_sessions_left_censored():
    days = np.array([0.0, 50, 100, 130, 160, 190, 240, 290, 340, 390])
    post = _course(days[3:], np.array([np.log(2000.0), 0.2, 0.0005]))
    vols = np.concatenate([[1000.0, 1500.0, 2000.0], np.where(post < 100.0, 0.0, post)])
    lon = pd.DataFrame({"subject": "01", "lesion": 1, "session": [f"{d:g}" for d in days],
                        "day": days, "volume_mm3": vols,
                        "status": np.where(vols > 0, "present", "absent"), "components": 1})
    events = pd.DataFrame({"subject": ["01"], "day": [100.0], "event": ["radiosurgery"]})
    fits, _, _ = fit_growth(lon, events, config=_config(detection_limit_mm3=100.0))
    rows = fits[(fits.window == "whole-phase") & (fits.model == "regression_regrowth")]
    assert len(rows) == 1
    row = rows.iloc[0]
    first_unseen = days[3:][post < 100.0][0]
    assert row.first_absent_day == first_unseen and "left-censored" in row.note
    assert row.n_points == 7 and row.decay_per_day > row.regrowth_per_day > 0


def _config(**fitting):
    from pipeline.config import load_config

    return load_config(None, fitting=fitting)
