"""What every growth law is made of: the :class:`Law` record and the two ratios that keep the
closed forms exact through beta = 1 (``log1p(x)/x`` and ``expm1(x)/x``). Both the growth laws
(:mod:`pipeline.growth.laws`) and the response laws (:mod:`pipeline.growth.response_laws`)
build on it, so neither imports the other's registry."""
from __future__ import annotations

from collections.abc import Callable
from dataclasses import dataclass

import numpy as np

from pipeline.settings import FitSettings


Array = np.ndarray


def log1p_ratio(x: Array) -> Array:
    """``log1p(x) / x``, equal to 1 at ``x = 0`` and ``nan`` for ``x <= -1``.

    Examples
    --------
    >>> log1p_ratio(np.array([0.0, 1e-12, np.e - 1])).round(12).tolist()
    [1.0, 1.0, 0.581976706869]
    """
    x = np.asarray(x, dtype=float)
    with np.errstate(divide="ignore", invalid="ignore"):
        out = np.log1p(x) / x
    out = np.atleast_1d(out)
    xs = np.broadcast_to(x, out.shape)
    small = np.abs(xs) < 1e-5                          # series 1 - x/2 + x^2/3 - x^3/4
    if small.any():
        z = xs[small]
        out[small] = 1.0 - z * (0.5 - z * (1.0 / 3.0 - 0.25 * z))
    out[xs <= -1.0] = np.nan
    return out.reshape(np.shape(x)) if np.ndim(x) == 0 else out


def expm1_ratio(x: Array) -> Array:
    """``expm1(x) / x``, equal to 1 at ``x = 0`` (stable near 0).

    Examples
    --------
    >>> expm1_ratio(np.array([0.0, np.log(2.0)])).round(12).tolist()
    [1.0, 1.442695040889]
    """
    x = np.asarray(x, dtype=float)
    with np.errstate(over="ignore", invalid="ignore", divide="ignore"):
        out = np.atleast_1d(np.expm1(x) / x)
    xs = np.broadcast_to(x, out.shape)
    small = np.abs(xs) < 1e-5                          # series 1 + x/2 + x^2/6 + x^3/24
    if small.any():
        z = xs[small]
        out[small] = 1.0 + z * (0.5 + z * (1.0 / 6.0 + z / 24.0))
    return out.reshape(np.shape(x)) if np.ndim(x) == 0 else out


@dataclass(frozen=True)
class Law:
    """One growth law.

    Attributes
    ----------
    name : str
        Value of the ``model`` column.
    ode : str
        The differential equation, printed beside the name.
    params : tuple of str
        Parameter names in the order of ``theta``'s last axis (``log_v0`` first, the initial
        specific growth rate second).
    log_volume : callable
        ``(t (..., n), theta (..., p)) -> ln V (..., n)``; ``nan`` outside the law's domain.
    rhs : callable
        ``(t, V, theta (p,)) -> dV/dt``, for checking the closed form against integration.
    gain_time : callable
        ``(theta (..., p), t (...), log_gain) -> days`` for the curve to grow by
        ``exp(log_gain)`` from ``t`` (``nan`` when it never does).
    initial_rate : callable
        ``theta -> (dV/dt)/V at t = 0`` (1/day).
    beta : float or None
        The fixed exponent of dV/dt = alpha V^beta, or None when the law is not of that form
        (the power law's beta is its third parameter).
    source : str
        Where the closed form comes from.
    custom_bounds, custom_starts : callable, optional
        A law's own :meth:`bounds` and :meth:`starts` (same signatures), for laws added outside
        this module (:mod:`pipeline.growth.response_laws`).
    derived : callable, optional
        ``theta (M, p) -> {column: (M,)}``: the law's own figures for ``fits.tsv``.
    """

    name: str
    ode: str
    params: tuple[str, ...]
    log_volume: Callable[[Array, Array], Array]
    rhs: Callable[[float, Array, Array], Array]
    gain_time: Callable[[Array, Array, float], Array]
    initial_rate: Callable[[Array], Array]
    beta: float | None
    source: str
    custom_bounds: Callable[[Array, Array, FitSettings], tuple[Array, Array]] | None = None
    custom_starts: Callable[[Array, Array, Array, Array], list[Array]] | None = None
    derived: Callable[[Array], dict[str, Array]] | None = None

    @property
    def n_params(self) -> int:
        """Number of free parameters."""
        return len(self.params)

    def bounds(self, y_low: Array, y_high: Array, settings: FitSettings) -> tuple[Array, Array]:
        """Box bounds ``(M, p)`` from each series' smallest/largest log-volume and the settings.

        ``log_v0`` lies within 5 (e-folds) of the observed range; rates within
        ``+-max_rate_per_day`` (Gompertz c in ``[0, max_rate_per_day]``); the power-law beta in
        ``beta_bounds``; the logistic capacity between ``e^-5`` times the smallest and ``e^10``
        times the largest volume.
        """
        if self.custom_bounds is not None:
            return self.custom_bounds(y_low, y_high, settings)
        rate = settings.max_rate_per_day
        lo = [y_low - 5.0, np.full_like(y_low, -rate)]
        hi = [y_high + 5.0, np.full_like(y_low, rate)]
        if self.name == "power":
            lo.append(np.full_like(y_low, settings.beta_bounds[0]))
            hi.append(np.full_like(y_low, settings.beta_bounds[1]))
        elif self.name == "gompertz":
            lo.append(np.zeros_like(y_low))
            hi.append(np.full_like(y_low, rate))
        elif self.name == "logistic":
            lo.append(y_low - 5.0)
            hi.append(y_high + 10.0)
        return np.stack(lo, axis=-1), np.stack(hi, axis=-1)

    def starts(self, intercept: Array, slope: Array, span: Array, y_high: Array) -> list[Array]:
        """Start values ``(M, p)`` from the log-linear regression (intercept, slope 1/day).

        ``span`` is the window length in days; ``y_high`` the largest observed log-volume.
        """
        if self.custom_starts is not None:
            return self.custom_starts(intercept, slope, span, y_high)
        span = np.maximum(span, 1e-9)
        if self.name == "exponential":
            return [np.stack([intercept, slope], -1)]
        if self.name == "surface":
            k = slope * expm1_ratio(slope * span / 3.0)
            return [np.stack([intercept, k], -1)]
        if self.name == "power":
            out = []
            for beta in (2.0 / 3.0, 1.0, 1.3):
                k = slope * expm1_ratio((1.0 - beta) * slope * span)
                out.append(np.stack([intercept, k, np.full_like(k, beta)], -1))
            return out
        if self.name == "gompertz":
            return [np.stack([intercept, slope * f, np.full_like(slope, c / span)], -1)
                    for f, c in ((1.0, 0.0), (2.0, 1.0), (4.0, 3.0))]
        out = []                                       # logistic
        for extra in (0.2, 1.0, 3.0):
            lk = y_high + extra
            q = np.exp(np.minimum(intercept - lk, 0.0))
            out.append(np.stack([intercept, slope / np.maximum(1.0 - q, 0.05), lk], -1))
        return out
