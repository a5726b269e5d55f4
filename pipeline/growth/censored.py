"""Left-censored fits: sessions where a lesion was not seen enter as "below the detection limit".

A lesion that is absent (volume 0) or at or below ``detection_limit_mm3`` after an event is not
missing: its volume is known to lie below the limit L. With normal errors of SD sigma on the
natural log of the volume, the log-likelihood of a curve f is (the censored normal
model of Tobin J. Econometrica 1958, from memory)

    sum over seen sessions      log phi((y_i - f_i) / sigma) - log sigma
    + sum over unseen sessions  log Phi((log L - f_j) / sigma),

maximised here over the law's parameters (and sigma unless ``measurement_error`` is set). The
limit is ``detection_limit_mm3`` when configured, else the smallest positive volume of the whole
table (the smallest lesion the segmentation reported), said in the row's note.
"""
from __future__ import annotations

import numpy as np
from scipy import optimize, special

from pipeline.growth.solvers import linear_start
from pipeline.growth.laws import Law
from pipeline.settings import FitSettings

__all__ = ["censored_loglik", "fit_censored"]


def censored_loglik(y: np.ndarray, fitted: np.ndarray, censored: np.ndarray, log_limit: float,
                    sigma: float) -> float:
    """Log-likelihood of ln-volumes ``y`` around ``fitted``; censored entries lie below the limit.

    Examples
    --------
    >>> y = np.array([1.0, 0.0]); f = np.array([1.2, 0.3])
    >>> round(censored_loglik(y, f, np.array([False, True]), 0.5, 0.2), 6)
    0.017746
    """
    z_seen = (y[~censored] - fitted[~censored]) / sigma
    z_cens = (log_limit - fitted[censored]) / sigma
    seen = -0.5 * np.sum(z_seen ** 2) - len(z_seen) * (0.5 * np.log(2.0 * np.pi) + np.log(sigma))
    return float(seen + np.sum(special.log_ndtr(z_cens)))      # log_ndtr = log Phi


def _objective(law: Law, t: np.ndarray, y: np.ndarray, censored: np.ndarray, log_limit: float,
               known_sigma: float):
    def negative(x: np.ndarray) -> float:
        theta = x[:law.n_params]
        sigma = known_sigma if known_sigma > 0 else float(np.exp(x[-1]))
        with np.errstate(all="ignore"):
            fitted = law.log_volume(t[None, :], theta[None, :])[0]
        if not np.all(np.isfinite(fitted)):
            return 1e300
        value = -censored_loglik(y, fitted, censored, log_limit, sigma)
        return value if np.isfinite(value) else 1e300
    return negative


def fit_censored(law: Law, t: np.ndarray, y: np.ndarray, censored: np.ndarray, log_limit: float,
                 *, settings: FitSettings = FitSettings()) -> dict:
    """Maximum-likelihood fit of ``law`` with left-censored sessions (one series).

    Parameters
    ----------
    law : Law
    t : (n,) ndarray
        Days since the series' first session.
    y : (n,) ndarray
        ln-volumes of the seen sessions (any value where ``censored``).
    censored : (n,) bool ndarray
        Sessions below the detection limit.
    log_limit : float
        ln of the detection limit (mm^3).

    Returns
    -------
    dict
        ``theta``, ``sigma``, ``loglik``, ``aicc`` (-2 logL + 2k + 2k(k+1)/(n-k-1) less the
        constants that :func:`pipeline.growth.fit_table.aicc` drops), ``n`` and ``ok``.

    Examples
    --------
    >>> from pipeline.growth.laws import LAWS
    >>> t = np.array([0.0, 10, 20, 30]); y = np.log([100.0, 50, 25, 1.0])
    >>> out = fit_censored(LAWS["exponential"], t, y, np.array([False, False, False, True]),
    ...                    np.log(20.0), settings=FitSettings(measurement_error=0.05))
    >>> round(float(out["theta"][1]), 3)
    -0.069
    """
    known = settings.measurement_error
    seen = ~censored
    lo, hi = law.bounds(np.array([y[seen].min()]), np.array([y[seen].max()]), settings)
    intercept, slope = linear_start(t[seen][None, :], y[seen][None, :])
    starts = law.starts(intercept, slope, np.array([t[-1]]), np.array([y[seen].max()]))
    bounds = list(zip(lo[0], hi[0])) + ([] if known > 0 else [(np.log(1e-3), np.log(5.0))])
    negative = _objective(law, t, y, censored, log_limit, known)
    points = [np.clip(start[0], lo[0], hi[0]) for start in starts]
    points = [x if known > 0 else np.append(x, np.log(0.1)) for x in points]
    screened = sorted(points, key=negative)[:3]       # the three most likely starts
    best = None
    for x0 in screened:
        res = optimize.minimize(negative, x0, method="TNC", bounds=bounds,
                                options={"maxfun": 2000})
        if best is None or res.fun < best.fun:
            best = res
    n, k = len(t), law.n_params + (0 if known > 0 else 1)
    loglik = -float(best.fun)
    ok = bool(np.isfinite(loglik) and best.fun < 1e299)
    sigma = known if known > 0 else float(np.exp(best.x[-1]))
    # constants as in growth_notes.aicc: rss/sigma^2 (sigma known) or n ln(rss/n) (estimated)
    constant = n * np.log(2.0 * np.pi * sigma ** 2) if known > 0 else \
        n * (1.0 + np.log(2.0 * np.pi))
    aicc = -2.0 * loglik - constant + 2 * k + \
        (2.0 * k * (k + 1) / (n - k - 1) if n - k - 1 > 0 else np.nan)
    return {"theta": best.x[:law.n_params], "sigma": sigma, "loglik": loglik,
            "aicc": aicc if ok and n - k - 1 > 0 else np.nan, "n": n, "ok": ok}
