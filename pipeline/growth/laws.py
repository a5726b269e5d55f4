"""Growth laws: closed-form log-volume curves, their ODEs and the exact 3-point power-law solution.

Every law is a :class:`Law`: a name, the ODE it solves (printed next to the name in outputs),
its parameter names, a vectorised ``log_volume(t, theta)`` and the right-hand side of the ODE
(used by the tests against numerical integration). All laws share the parameters ``log_v0``
(natural log of the volume at the window's first day, ``t = 0``) and an initial specific growth
rate (1/day), so that every fit is invariant to the volume unit (docs/methods.md §1.1, §1.4).

``theta`` is an array ``(..., p)``; ``t`` an array ``(..., n)`` of days since the window start; the
result broadcasts to ``(..., n)``. Values outside a law's domain (beyond a finite-time singularity,
or after a shrinking power law reached zero) are ``nan``, never an exception.

To add a law: write its ``log_volume`` (and ``rhs``), build a :class:`Law` and put it in
:data:`LAWS`; the fitting front end (:mod:`pipeline.growth`) needs nothing else than ``starts``
and ``bounds``.

References
----------
Power law / generalized von Bertalanffy / Mendelsohn dV/dt = alpha V^beta: Gerlee P. The model
muddle: in search of tumor growth laws. Cancer Res 2013;73:2407-2411; Benzekry S et al. Classical
mathematical models for description and prediction of experimental tumor growth. PLoS Comput Biol
2014;10:e1003800. Gompertz and logistic: same sources. Surface (radius linear in time, beta = 2/3):
Bru A et al. Biophys J 2003;85:2948-2961.
"""
from __future__ import annotations

import numpy as np

from pipeline.growth.law_base import Array, Law, expm1_ratio, log1p_ratio
from pipeline.growth.response_laws import RESPONSE_LAWS


__all__ = ["Law", "LAWS", "RESPONSE_MODELS", "power_three_point", "log1p_ratio", "expm1_ratio"]


def _col(theta: Array, j: int) -> Array:
    return np.asarray(theta, dtype=float)[..., j, None]


# --- power law: dV/dt = alpha V^beta, with k = alpha V0^(beta-1) ---------------------------------
# V = V0 (1 + (1-beta) k t)^(1/(1-beta)) = V0 exp(log1p((1-beta) k t) / (1-beta))
# (closed form by the substitution u = V^(1-beta), docs/methods.md §1.1; beta = 1 gives V0 exp(k
# t)).
# For beta > 1 and k > 0 the curve blows up at t* = 1 / ((beta-1) k).

def _power_log_volume(t: Array, theta: Array) -> Array:
    lv0, k, beta = _col(theta, 0), _col(theta, 1), _col(theta, 2)
    x = (1.0 - beta) * k * t
    return lv0 + k * t * log1p_ratio(x)


def _power_rhs(t: float, v: Array, theta: Array) -> Array:
    lv0, k, beta = theta
    alpha = k * np.exp(lv0 * (1.0 - beta))
    return alpha * np.power(v, beta)


def _power_gain_time(theta: Array, t: Array, log_gain: float) -> Array:
    """Days for the curve to grow by ``exp(log_gain)`` from ``t``: DT(V) of docs/methods.md §1.1."""
    k, beta = theta[..., 1], theta[..., 2]
    u = 1.0 - beta
    with np.errstate(divide="ignore", invalid="ignore"):
        rate = k / (1.0 + u * k * t)                   # instantaneous SGR (dV/dt)/V at t
        tau = log_gain * expm1_ratio(u * log_gain) / rate
    return np.where(rate > 0, tau, np.nan)


# --- exponential: dV/dt = k V ---------------------------------------------------------------------

def _exp_log_volume(t: Array, theta: Array) -> Array:
    return _col(theta, 0) + _col(theta, 1) * t


def _exp_rhs(t: float, v: Array, theta: Array) -> Array:
    return theta[1] * v


def _exp_gain_time(theta: Array, t: Array, log_gain: float) -> Array:
    k = theta[..., 1]
    with np.errstate(divide="ignore"):
        return np.where(k > 0, log_gain / k, np.nan)


# --- surface-limited: dV/dt = alpha V^(2/3); V^(1/3) linear in t, k = alpha V0^(-1/3) ----------
# V = V0 (1 + k t / 3)^3, i.e. the radius grows linearly (Bru et al. 2003).

def _surface_log_volume(t: Array, theta: Array) -> Array:
    return _power_log_volume(t, np.concatenate(
        [np.asarray(theta, float), np.full(np.shape(theta)[:-1] + (1,), 2.0 / 3.0)], axis=-1))


def _surface_rhs(t: float, v: Array, theta: Array) -> Array:
    return _power_rhs(t, v, np.array([theta[0], theta[1], 2.0 / 3.0]))


def _surface_gain_time(theta: Array, t: Array, log_gain: float) -> Array:
    full = np.concatenate([theta, np.full(theta.shape[:-1] + (1,), 2.0 / 3.0)], axis=-1)
    return _power_gain_time(full, t, log_gain)


# --- Gompertz (time form): dV/dt = k exp(-c t) V; V = V0 exp((k/c)(1 - exp(-c t))) --------------
# Equivalently dV/dt = c V ln(K/V) with K = V0 exp(k/c) (docs/methods.md §1.1).
# c >= 0; c = 0 is exponential.

def _gompertz_log_volume(t: Array, theta: Array) -> Array:
    lv0, k, c = _col(theta, 0), _col(theta, 1), _col(theta, 2)
    return lv0 + k * t * expm1_ratio(-c * t)     # (1 - e^{-ct}) / (ct) -> 1 as c -> 0


def _gompertz_rhs(t: float, v: Array, theta: Array) -> Array:
    return theta[1] * np.exp(-theta[2] * t) * v


def _gompertz_gain_time(theta: Array, t: Array, log_gain: float) -> Array:
    """ln K - ln V(t) = (k/c) e^{-ct}; solve for the time that removes ``log_gain`` of it."""
    k, c = theta[..., 1], theta[..., 2]
    with np.errstate(divide="ignore", invalid="ignore", over="ignore"):
        scale = log_gain * np.exp(c * t) / k           # = tau when c = 0
        z = c * scale                                  # = log_gain / (ln K - ln V(t))
        tau = scale * log1p_ratio(-z)               # = -log1p(-z) / c
    return np.where((k > 0) & (z < 1), tau, np.nan)


# --- logistic: dV/dt = r V (1 - V/K); V = K V0 / (V0 + (K - V0) exp(-r t)) -----------------------

def _logistic_log_volume(t: Array, theta: Array) -> Array:
    lv0, r, lk = _col(theta, 0), _col(theta, 1), _col(theta, 2)
    q = np.exp(lv0 - lk)                               # V0 / K
    rt = r * t
    with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
        near = np.log1p(q * np.expm1(np.minimum(rt, 30.0)))    # nan outside the domain
        if np.any(rt > 30.0):                                   # avoid overflow of exp(r t)
            far = rt + np.log(q + (1.0 - q) * np.exp(-np.maximum(rt, 30.0)))
            near = np.where(rt <= 30.0, near, far)
    return lv0 + rt - near


def _logistic_rhs(t: float, v: Array, theta: Array) -> Array:
    return theta[1] * v * (1.0 - v / np.exp(theta[2]))


def _logistic_gain_time(theta: Array, t: Array, log_gain: float) -> Array:
    r, lk = theta[..., 1], theta[..., 2]
    lv = _logistic_log_volume(t[..., None], theta)[..., 0]
    p = np.exp(lv - lk)                                # V(t) / K
    factor = np.exp(log_gain)
    with np.errstate(divide="ignore", invalid="ignore"):
        tau = (log_gain + np.log1p(-p) - np.log1p(-factor * p)) / r
    return np.where((r > 0) & (factor * p < 1), tau, np.nan)


# --- the interface -------------------------------------------------------------------------

def _initial_rate_k(theta: Array) -> Array:
    return theta[..., 1]


def _initial_rate_logistic(theta: Array) -> Array:
    return theta[..., 1] * (1.0 - np.exp(theta[..., 0] - theta[..., 2]))


LAWS: dict[str, Law] = {
    "power": Law("power", "dV/dt = alpha V^beta", ("log_v0", "k", "beta"),
                 _power_log_volume, _power_rhs, _power_gain_time, _initial_rate_k, None,
                 "generalized von Bertalanffy / Mendelsohn; Gerlee 2013, Benzekry et al. 2014"),
    "exponential": Law("exponential", "dV/dt = alpha V", ("log_v0", "k"),
                       _exp_log_volume, _exp_rhs, _exp_gain_time, _initial_rate_k, 1.0,
                       "exponential growth; Benzekry et al. 2014"),
    "gompertz": Law("gompertz", "dV/dt = k exp(-c t) V", ("log_v0", "k", "c"),
                    _gompertz_log_volume, _gompertz_rhs, _gompertz_gain_time, _initial_rate_k,
                    None, "Gompertz (time form); Benzekry et al. 2014"),
    "logistic": Law("logistic", "dV/dt = r V (1 - V/K)", ("log_v0", "r", "log_capacity"),
                    _logistic_log_volume, _logistic_rhs, _logistic_gain_time,
                    _initial_rate_logistic, None, "logistic (Verhulst); Benzekry et al. 2014"),
    "surface": Law("surface", "dV/dt = alpha V^(2/3)", ("log_v0", "k"),
                   _surface_log_volume, _surface_rhs, _surface_gain_time, _initial_rate_k,
                   2.0 / 3.0, "surface-limited growth, radius linear in time; Bru et al. 2003"),
}
LAWS.update(RESPONSE_LAWS)   # regression-regrowth and von Bertalanffy with loss

RESPONSE_MODELS = ("regression_regrowth", "bertalanffy_loss")   # defined in response_laws


def power_three_point(t: Array, log_v: Array) -> tuple[Array, Array, Array, Array]:
    """Exact power-law curve through three points per row (no residual left).

    With ``u = 1 - beta`` the volume ``V^u`` is a straight line in ``t``, so the middle volume is
    the weighted power mean of order ``u`` of the outer two: ``V1^u = w0 V0^u + w2 V2^u``,
    ``w0 = (t2 - t1)/(t2 - t0)``, ``w2 = (t1 - t0)/(t2 - t0)`` (docs/methods.md §1.5, check values
    C9-C13). The root
    is sought for ``u`` in ``[-30, 30]`` by bisection of the divided equation
    ``[(V1^u - V0^u)/(t1 - t0) - (V2^u - V1^u)/(t2 - t1)] / u``, which removes the spurious root
    ``u = 0`` (at ``u = 0`` it equals the difference of the two log-slopes). A solution exists
    only when the middle volume lies strictly between the others (power means are increasing
    in ``u``); otherwise ``ok`` is False.

    Parameters
    ----------
    t : (M, 3) ndarray
        Strictly increasing days.
    log_v : (M, 3) ndarray
        Natural logs of the volumes.

    Returns
    -------
    log_v0, k, beta, ok : (M,) ndarrays
        ``theta`` of the power law with ``t = 0`` at ``t[:, 0]``; ``nan`` where not ``ok``.

    Examples
    --------
    >>> lv0, k, beta, ok = power_three_point(np.array([[0., 1, 2]]), np.log([[1., 4, 9]]))
    >>> float(beta[0].round(10)), float((k * np.exp(lv0 * (1 - beta)))[0].round(10)), bool(ok[0])
    (0.5, 2.0, True)
    """
    t = np.asarray(t, float)
    lv = np.asarray(log_v, float)
    d1, d2 = lv[:, 1] - lv[:, 0], lv[:, 2] - lv[:, 1]
    h1, h2 = t[:, 1] - t[:, 0], t[:, 2] - t[:, 1]

    def h(u: Array) -> Array:       # divided equation, scaled by V0^-u (same sign)
        with np.errstate(over="ignore", invalid="ignore"):
            return d1 * expm1_ratio(u * d1) / h1 - np.exp(u * d1) * d2 * expm1_ratio(u * d2) / h2

    lo, hi = np.full(len(t), -30.0), np.full(len(t), 30.0)
    f_lo, f_hi = h(lo), h(hi)
    ok = (d1 * d2 > 0) & np.isfinite(f_lo) & np.isfinite(f_hi) & (f_lo * f_hi <= 0)
    for _ in range(80):             # bisection to ~5e-23 of the bracket: machine precision
        mid = 0.5 * (lo + hi)
        f_mid = h(mid)
        left = np.sign(f_mid) == np.sign(f_lo)
        lo, f_lo = np.where(left, mid, lo), np.where(left, f_mid, f_lo)
        hi = np.where(left, hi, mid)
    u = 0.5 * (lo + hi)
    span = t[:, 2] - t[:, 0]
    k = (lv[:, 2] - lv[:, 0]) * expm1_ratio(u * (lv[:, 2] - lv[:, 0])) / span
    nan = np.full(len(t), np.nan)
    return (np.where(ok, lv[:, 0], nan), np.where(ok, k, nan), np.where(ok, 1.0 - u, nan), ok)
