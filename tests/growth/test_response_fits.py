"""Post-event phases: response laws over the whole phase, and a nadir that noise cannot move.

Invented series: an event on day 100, sessions on days 0, 50, 100, 130, ..., 390.
"""
import numpy as np
import pandas as pd
import pytest

from pipeline.api import fit_growth
from pipeline.growth.laws import LAWS
from pipeline.growth.phases import assign_phases, nadir_tolerance
from pipeline.settings import FitSettings

DAYS = np.array([0.0, 50, 100, 130, 160, 190, 240, 290, 340, 390])
EVENT = pd.DataFrame({"subject": ["01"], "day": [100.0], "event": ["radiosurgery"]})


def _lon(series: dict[int, np.ndarray]) -> pd.DataFrame:
    return pd.DataFrame([{"subject": "01", "lesion": lesion, "session": f"{int(d)}", "day": d,
                          "volume_mm3": float(v), "status": "present", "components": 1}
                         for lesion, vs in series.items() for d, v in zip(DAYS, vs)])


def test_whole_phase_response_law_recovers_the_treated_course():
    # noise-free regression-regrowth data after the event (V_s = 2000, d = 0.03, g = 0.006;
    # Stein et al. 2008 closed form); the untreated part grows exponentially
    truth = np.array([np.log(2000.0), 0.03, 0.006])
    post = DAYS > 100
    t = DAYS[post] - DAYS[post][0]
    v = np.concatenate([[1000.0, 1400.0, 1900.0],
                        np.exp(LAWS["regression_regrowth"].log_volume(t[None], truth[None])[0])])
    shrinking = np.concatenate([[900.0, 1000.0, 1200.0],
                                1200.0 * np.exp(-0.01 * (DAYS[post] - 100))])
    fits, _, unfitted = fit_growth(_lon({1: v, 2: shrinking}), EVENT)
    rr = fits[(fits.model == "regression_regrowth") & (fits.lesion == 1)].iloc[0]
    assert rr.window == "whole-phase" and rr.n_points == 7 and rr.day_start == 130.0
    assert not rr.best and "shrinkage included" in rr.note
    assert [rr.decay_per_day, rr.regrowth_per_day] == pytest.approx([0.03, 0.006], rel=1e-4)
    t_n = np.log(0.03 / 0.006) / 0.036                    # ln(d/g)/(d+g)
    assert rr.nadir_day == pytest.approx(130.0 + t_n, rel=1e-4)
    depth = np.exp(-0.03 * t_n) + np.exp(0.006 * t_n) - 1.0
    assert rr.depth_of_response == pytest.approx(depth, rel=1e-4)
    assert rr.nadir_mm3 == pytest.approx(2000.0 * depth, rel=1e-4)
    # the regrowth rows stay, fitted from the nadir, and say which sessions were left out
    regrowth = fits[(fits.lesion == 1) & (fits.window == "from-nadir")]
    assert len(regrowth) and regrowth.best.sum() == 1
    # the curve is 2000, 1207.6, 1197.3, 1943.4, ... on days 130, 160, 190, 240: day 160 is
    # within the noise tolerance (x 1.32) of the minimum, so only day 130 is left out
    assert regrowth.day_start.eq(160.0).all()
    assert all("before-nadir 1 (day 130)" in n for n in regrowth.note)
    # a lesion that keeps shrinking, formerly only in unfitted.tsv, now has whole-phase rows
    gone = fits[(fits.lesion == 2) & (fits.phase == "after-radiosurgery")]
    assert set(gone.window) == {"whole-phase"}
    assert {"regression_regrowth", "bertalanffy_loss"} <= set(gone.model)
    rr2 = gone[gone.model == "regression_regrowth"].iloc[0]
    assert rr2.decay_per_day - rr2.regrowth_per_day == pytest.approx(0.01, rel=1e-3)
    assert ((unfitted.lesion == 2) & (unfitted.phase == "after-radiosurgery")).any()


def test_nadir_tolerance_comes_from_the_measurement_error():
    # z(0.975) sqrt(2) sigma: the spread of the difference of two measurements of one volume
    # with independent normal ln-errors of SD sigma (common practice)
    assert nadir_tolerance(FitSettings(measurement_error=0.05)) == pytest.approx(
        1.959964 * np.sqrt(2) * 0.05, rel=1e-6)
    lon = _lon({1: [100, 110, 120, 130, 125, 150, 170, 190, 210, 240],
                2: [100, 120, 150, 2000, 900, 450, 600, 800, 1000, 1200]})
    out = assign_phases(lon, EVENT)
    # lesion 1: 125 after 130 is noise, nothing is left out; lesion 2 responded: 2000 and 900
    # lie far above the nadir 450 and stay out
    assert (out[out.lesion == 1].fit_exclusion == "").all()
    assert out[out.lesion == 2].fit_exclusion.tolist()[3:6] == ["before-nadir"] * 2 + [""]
    raw = assign_phases(lon, EVENT, settings=FitSettings(nadir_noise_sd=0.0))
    assert (raw[raw.lesion == 1].fit_exclusion == "before-nadir").sum() == 1


def test_growing_lesions_keep_their_sessions_under_noise():
    # 1.5-fold growth over the phase, 10 % log-normal noise (invented): with the raw minimum
    # about half of the lesions lose a session; with the tolerance few do
    rng = np.random.default_rng(1)
    growth = np.where(DAYS > 100, 1.5 ** ((DAYS - 100) / 290), 1.0)
    series = {i: 500 * growth * np.exp(0.1 * rng.standard_normal(len(DAYS))) for i in range(300)}
    lon = _lon(series)
    lost = {}
    for name, settings in (("raw", FitSettings(nadir_noise_sd=0.0)), ("noise", FitSettings())):
        out = assign_phases(lon, EVENT, settings=settings)
        lost[name] = (out.fit_exclusion == "before-nadir").groupby(out.lesion).sum()
    assert (lost["raw"] >= 1).mean() > 0.3
    assert (lost["noise"] >= 1).mean() < 0.08 and (lost["noise"] >= 3).mean() == 0.0
