"""Growth laws: closed forms, limits, exact 3-point solution (check values from docs/methods.md
§7)."""
import numpy as np
import pytest
from scipy.integrate import solve_ivp

from pipeline.growth.laws import LAWS, log1p_ratio, power_three_point


def _theta_power(v0, alpha, beta):
    """(log_v0, k, beta) from the textbook parameters: k = alpha V0^(beta - 1)."""
    return np.array([np.log(v0), alpha * v0 ** (beta - 1.0), beta])


def _integrate(law, theta, t_end, v0):
    t = np.linspace(0.0, t_end, 9)
    sol = solve_ivp(lambda s, v: law.rhs(s, v, theta), (0.0, t_end), [v0], t_eval=t,
                    rtol=1e-12, atol=1e-14, method="DOP853")
    return t, sol.y[0]


CASES = [("power", _theta_power(1.0, 2.0, 0.5), 3.0),
         ("power", _theta_power(1.0, 3.0, 2 / 3), 3.0),
         ("power", _theta_power(1.0, np.log(2), 1.0), 3.0),
         ("power", _theta_power(100.0, 0.05, 1.25), 0.9 * 25.298221),
         ("power", _theta_power(1.0, 0.5, 1.5), 0.9 * 4.0),
         ("power", _theta_power(1.0, 0.25, 2.0), 0.9 * 4.0),
         ("power", _theta_power(10.0, -0.5, 0.5), 5.0),
         ("exponential", np.array([np.log(5.0), 0.1]), 20.0),
         ("surface", np.array([0.0, 3.0]), 2.0),
         ("gompertz", np.array([0.0, 0.5, 0.1]), 60.0),
         ("logistic", np.array([np.log(10.0), 0.3, np.log(1000.0)]), 40.0)]


@pytest.mark.parametrize("name,theta,t_end", CASES)
def test_closed_form_matches_ode(name, theta, t_end):
    # Reference: numerical integration with scipy.integrate.solve_ivp (rtol 1e-12, atol 1e-14);
    # docs/methods.md §1.8 / check values C1-C5 report agreement to <= 2e-11 relative, 1e-8 is a
    # safe tolerance.
    law = LAWS[name]
    t, v_ode = _integrate(law, theta, t_end, float(np.exp(theta[0])))
    v_closed = np.exp(law.log_volume(t[None, :], theta[None, :])[0])
    np.testing.assert_allclose(v_closed, v_ode, rtol=1e-8)


def test_check_values_c1_to_c4():
    # Reference: docs/methods.md, check values C1-C4 (analytic: V = (1+t)^2, (1+t)^3, blow-up t* =
    # 4, ...),
    # recomputed here from the closed form V = (V0^(1-b) + a(1-b)t)^(1/(1-b)).
    power = LAWS["power"]
    t = np.array([[0.0, 1.0, 2.0]])

    def volumes(v0, a, b):
        return np.exp(power.log_volume(t, _theta_power(v0, a, b)[None, :])[0])

    np.testing.assert_allclose(volumes(1, 2, 0.5), [1, 4, 9], rtol=1e-12)            # C1
    np.testing.assert_allclose(volumes(1, 3, 2 / 3), [1, 8, 27], rtol=1e-12)          # C2
    np.testing.assert_allclose(volumes(1, 0.25, 2), [1, 4 / 3, 2], rtol=1e-12)        # C3
    np.testing.assert_allclose(volumes(1, 0.5, 1.5), [1, 16 / 9, 4], rtol=1e-12)      # C3
    v = volumes(100, 0.05, 1.25)                                                      # C4
    direct = (100 ** -0.25 - 0.25 * 0.05 * t[0]) ** -4.0
    np.testing.assert_allclose(v, direct, rtol=1e-12)
    np.testing.assert_allclose(v[1:], [117.50653, 139.01731], rtol=1e-7)
    k = 0.05 * 100 ** 0.25
    assert 1.0 / (0.25 * k) == pytest.approx(25.298221, rel=1e-7)                  # t* (C4)
    assert 1.0 / (1.0 * 0.25) == pytest.approx(4.0)                                  # t* (C3)
    theta = _theta_power(100, 0.05, 1.25)[None, :]
    dt = power.gain_time(theta, np.zeros(1), np.log(2.0))[0]
    assert dt == pytest.approx(4.0250377, rel=1e-7)                                 # C4 DT
    assert np.exp(power.log_volume(np.array([[dt]]), theta)[0, 0]) == pytest.approx(200.0)


def test_singularity_is_nan_not_error():
    # Reference: docs/methods.md §1.1: V -> inf as t -> t* = V0^(1-b)/(a(b-1)); C3 gives t* = 4.
    theta = _theta_power(1.0, 0.25, 2.0)[None, :]
    v = LAWS["power"].log_volume(np.array([[3.999, 4.0, 5.0]]), theta)[0]
    assert np.isfinite(v[0]) and v[0] > np.log(999.0)
    assert not np.isfinite(v[1]) and np.isnan(v[2])


def test_gompertz_and_logistic_check_values_c5():
    # Reference: docs/methods.md, check value C5: Gompertz a = 0.5, c = 0.1, V0 = 1 -> K = e^5 =
    # 148.41316;
    # logistic r = 0.3, K = 1000, V0 = 10 tends to K (solve_ivp cross-check in the ODE test).
    g = LAWS["gompertz"].log_volume(np.array([[1e4]]), np.array([[0.0, 0.5, 0.1]]))[0, 0]
    assert np.exp(g) == pytest.approx(148.41316, rel=1e-7)
    lg = LAWS["logistic"].log_volume(np.array([[1e4]]),
                                     np.array([[np.log(10.0), 0.3, np.log(1000.0)]]))[0, 0]
    assert np.exp(lg) == pytest.approx(1000.0, rel=1e-12)


@pytest.mark.parametrize("delta", [1e-3, 1e-6, 1e-9, 1e-12, 0.0])
def test_beta_to_one_limit_is_exponential(delta):
    # Reference: analytic limit (1 + (1-b) k t)^(1/(1-b)) -> exp(k t) as b -> 1 (docs/methods.md
    # §1.1);
    # first-order term: ln V = k t - (1-b) (k t)^2 / 2 + O((1-b)^2).
    t = np.array([[0.0, 10.0, 50.0, 100.0]])
    k = 0.01
    for beta in (1.0 - delta, 1.0 + delta):
        lv = LAWS["power"].log_volume(t, np.array([[0.0, k, beta]]))[0]
        expected = k * t[0] - (1 - beta) * (k * t[0]) ** 2 / 2
        np.testing.assert_allclose(lv, expected, rtol=0, atol=abs(1 - beta) ** 2 + 1e-15)


def test_log1p_ratio_series_branch_matches_mpmath_free_reference():
    # Reference: Taylor series of log1p(x)/x = sum (-x)^n/(n+1) summed to 30 terms.
    x = np.array([-1e-3, -1e-6, 1e-7, 1e-4])
    series = sum((-x) ** n / (n + 1) for n in range(30))
    np.testing.assert_allclose(log1p_ratio(x), series, rtol=1e-14)


THREE_POINT = [  # Reference: docs/methods.md, check values C6, C9-C13 (times 0, 1, 2 unless given)
    ((0, 1, 2), (1, 4, 9), 0.5, 2.0),
    ((0, 1, 2), (1, 8, 27), 2 / 3, 3.0),
    ((0, 1, 2), (1, 2, 4), 1.0, np.log(2)),
    ((0, 1, 2), (1, 4 / 3, 2), 2.0, 0.25),
    ((0, 1, 2), (1, 16 / 9, 4), 1.5, 0.5),
    ((0, 1, 3), (1, 8, 64), 2 / 3, 3.0),
]


def test_exact_three_point_solution_c9_to_c13():
    t = np.array([c[0] for c in THREE_POINT], float)
    lv = np.log(np.array([c[1] for c in THREE_POINT], float))
    lv0, k, beta, ok = power_three_point(t, lv)
    assert ok.all()
    np.testing.assert_allclose(beta, [c[2] for c in THREE_POINT], atol=1e-10)
    alpha = k * np.exp(lv0 * (1 - beta))
    np.testing.assert_allclose(alpha, [c[3] for c in THREE_POINT], rtol=1e-9)
    # the curve passes through every point (zero residual)
    theta = np.stack([lv0, k, beta], -1)
    np.testing.assert_allclose(LAWS["power"].log_volume(t, theta), lv, atol=1e-10)


def test_ill_conditioning_c15_and_no_solution():
    # Reference: docs/methods.md, check value C15: times (0, 90, 180), V = (100, 150, 225) -> b =
    # 1.000;
    # middle x0.9 -> 2.343; x1.1 -> -0.205. Non-monotone triples have no exact fit (1.5).
    t = np.tile([0.0, 90.0, 180.0], (4, 1))
    v = np.array([[100, 150, 225], [100, 135, 225], [100, 165, 225], [100, 250, 225]], float)
    _, _, beta, ok = power_three_point(t, np.log(v))
    assert ok.tolist() == [True, True, True, False]
    np.testing.assert_allclose(beta[:3], [1.0, 2.343, -0.205], atol=6e-4)
    assert np.isnan(beta[3])


def test_exponential_doubling_time_is_ln2_over_rate():
    # Reference: Mehrara et al. Cancer Res 2007;67:3970-3975: DT = ln 2 / SGR (exponential).
    k = np.array([[0.0, 0.00693147]])
    assert LAWS["exponential"].gain_time(k, np.zeros(1), np.log(2))[0] == pytest.approx(
        np.log(2) / 0.00693147)


def test_gain_time_matches_curve_for_every_law():
    # Reference: definition: V(t + DT) = 2 V(t), evaluated with the law's own closed form.
    thetas = {"power": [np.log(50.0), 0.02, 0.8], "surface": [np.log(50.0), 0.02],
              "gompertz": [np.log(50.0), 0.05, 0.01], "logistic": [np.log(50.0), 0.05, np.log(1e4)],
              "exponential": [np.log(50.0), 0.02]}
    for name, theta in thetas.items():
        law = LAWS[name]
        th = np.array([theta])
        dt = law.gain_time(th, np.array([30.0]), np.log(2.0))[0]
        lv = law.log_volume(np.array([[30.0, 30.0 + dt]]), th)[0]
        assert lv[1] - lv[0] == pytest.approx(np.log(2.0), rel=1e-9), name
