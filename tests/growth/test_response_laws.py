"""Response laws against numerical integration, their special cases and closed-form figures."""
import numpy as np
import pytest
from scipy.integrate import solve_ivp
from scipy.optimize import minimize_scalar

from pipeline.growth.lesion_fits import fit_series
from pipeline.growth.laws import LAWS
from pipeline.growth.response_laws import nadir_figures
from pipeline.settings import FitSettings

RR, BL = LAWS["regression_regrowth"], LAWS["bertalanffy_loss"]


def _ode(law, theta, t_end):
    t = np.linspace(0.0, t_end, 11)
    sol = solve_ivp(lambda s, v: law.rhs(s, v, theta), (0.0, t_end), [float(np.exp(theta[0]))],
                    t_eval=t, rtol=1e-12, atol=1e-14, method="DOP853")
    return t, sol.y[0]


def _curve(law, t, theta):
    return np.exp(law.log_volume(np.atleast_2d(t), np.atleast_2d(theta))[0])


# theta of dV/dt = a V^b - c V is (log V0, k = a V0^(b-1), b, c)
BL_CASES = [np.array([0.0, 3.0, 2 / 3, 0.3]),   # docs/methods.md, check value C5: a 3, c 0.3, V0 1
            np.array([np.log(500.0), 0.02, 0.5, 0.005]),   # growth towards a plateau
            np.array([np.log(2000.0), 0.01, 0.8, 0.03]),   # shrinkage: loss beats growth
            np.array([np.log(50.0), 0.01, 1.3, 0.002])]    # b > 1, before any blow-up


@pytest.mark.parametrize("theta", BL_CASES)
def test_loss_term_law_matches_solve_ivp(theta):
    # Reference: scipy.integrate.solve_ivp of dV/dt = a V^b - c V (rtol 1e-12); the closed form
    # V^(1-b) = a/c + (V0^(1-b) - a/c) e^{-(1-b) c t} (docs/methods.md §1.1, general Bertalanffy)
    t, v = _ode(BL, theta, 60.0)
    np.testing.assert_allclose(_curve(BL, t, theta), v, rtol=1e-8)


def test_loss_term_special_cases_are_exponential_and_power():
    # b = 1: dV/dt = (a - c) V, the exponential law with rate k - c; c = 0: dV/dt = a V^b, the
    # power law (both by substitution into the ODE: common practice)
    t = np.linspace(0.0, 200.0, 9)
    one = np.array([np.log(300.0), 0.02, 1.0, 0.005])
    np.testing.assert_allclose(_curve(BL, t, one),
                               _curve(LAWS["exponential"], t, [np.log(300.0), 0.015]), rtol=1e-12)
    for b in (0.5, 2 / 3, 1.2):
        theta = np.array([np.log(300.0), 0.004, b, 0.0])
        np.testing.assert_allclose(_curve(BL, t, theta),
                                   _curve(LAWS["power"], t, [np.log(300.0), 0.004, b]),
                                   rtol=1e-12)
    near = np.array([np.log(300.0), 0.02, 1.0 + 1e-9, 0.005])       # stable through b = 1
    np.testing.assert_allclose(_curve(BL, t, near), _curve(BL, t, one), rtol=1e-6)


def test_loss_term_plateau_check_value_c5():
    # docs/methods.md, check value C5: von Bertalanffy a = 3, c = 0.3, V0 = 1 ->
    # V_inf = (a/c)^3 = 1000
    fig = BL.derived(BL_CASES[0][None, :])
    assert fig["capacity_mm3"][0] == pytest.approx(1000.0, rel=1e-12)
    assert _curve(BL, [400.0], BL_CASES[0])[0] == pytest.approx(1000.0, rel=1e-6)


@pytest.mark.parametrize("theta", [np.array([np.log(2000.0), 0.03, 0.008]),
                                   np.array([np.log(800.0), 0.0, 0.01]),
                                   np.array([np.log(800.0), 0.02, 0.0])])
def test_regression_regrowth_matches_solve_ivp_and_special_cases(theta):
    # Reference: solve_ivp of dV/dt = V_s (g e^{gt} - d e^{-dt}) (derivative of the closed form
    # of Stein et al. 2008); d = 0: V_s e^{gt}; g = 0: V_s e^{-dt} (substitution)
    t, v = _ode(RR, theta, 300.0)
    np.testing.assert_allclose(_curve(RR, t, theta), v, rtol=1e-8)
    d, g = theta[1], theta[2]
    if d == 0 or g == 0:
        np.testing.assert_allclose(_curve(RR, t, theta), np.exp(theta[0] + (g - d) * t),
                                   rtol=1e-12)


def test_time_to_nadir_closed_form_and_numerical_minimum():
    # t_n = ln(d/g)/(d+g) (dV/dt = 0), checked against scipy.optimize.minimize_scalar
    theta = np.array([np.log(2000.0), 0.03, 0.008])
    fig = nadir_figures(theta[None, :])
    t_n = np.log(0.03 / 0.008) / 0.038
    assert fig["nadir_day_rel"][0] == pytest.approx(t_n, rel=1e-12)
    best = minimize_scalar(lambda s: _curve(RR, [s], theta)[0], bounds=(0, 500),
                           method="bounded", options={"xatol": 1e-9})
    assert fig["nadir_day_rel"][0] == pytest.approx(best.x, abs=1e-4)
    assert fig["nadir_mm3"][0] == pytest.approx(best.fun, rel=1e-10)
    assert fig["depth_of_response"][0] == pytest.approx(best.fun / 2000.0, rel=1e-10)
    grows = nadir_figures(np.array([[0.0, 0.01, 0.02]]))
    assert grows["nadir_day_rel"][0] == 0.0 and grows["depth_of_response"][0] == 1.0
    assert np.isnan(nadir_figures(np.array([[0.0, 0.01, 0.0]]))["nadir_day_rel"][0])


def test_exact_data_recover_d_and_g():
    # noise-free data of the closed form (invented values): the fit returns its parameters
    days = np.array([0.0, 30, 60, 90, 140, 190, 240, 290])
    truth = np.array([np.log(2000.0), 0.035, 0.009])
    y = RR.log_volume(days[None, :], truth[None, :])
    out = fit_series(RR, days[None, :], y, settings=FitSettings(models=("regression_regrowth",)))
    np.testing.assert_allclose(out["theta"][0], truth, rtol=1e-5)
    assert out["rss"][0] < 1e-16


def test_gain_time_doubles_the_curve():
    for law, theta in ((RR, np.array([np.log(2000.0), 0.03, 0.008])), (BL, BL_CASES[1])):
        t0 = np.array([100.0])
        dt = law.gain_time(theta[None, :], t0, np.log(2.0))[0]
        ratio = _curve(law, [100.0 + dt], theta)[0] / _curve(law, [100.0], theta)[0]
        assert ratio == pytest.approx(2.0, rel=1e-9)
    shrinking = np.array([np.log(2000.0), 0.01, 0.8, 0.03])      # never doubles
    assert np.isnan(BL.gain_time(shrinking[None, :], np.zeros(1), np.log(2.0))[0])
