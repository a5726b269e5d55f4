"""Array numerics behind :mod:`pipeline.growth`: many small least-squares fits at once.

All fits minimise the residual sum of squares of log-volume (multiplicative error, docs/methods.md
§1.4)
for ``M`` series of equal length ``n`` at the same time (one numpy operation per step, no
per-lesion Python loop), which is what makes thousands of lesions take well under a second.

- :func:`levenberg_marquardt`: batched, box-bounded Levenberg-Marquardt (Marquardt 1963) with a
  central-difference Jacobian; a trial step that leaves a law's domain (``nan``) is rejected.
- :func:`power_profile`: the power law's profile ``RSS(beta) = min over (log_v0, k)`` for any
  array of betas; ``log_v0`` is eliminated in closed form (weighted mean) and ``k`` found by damped
  Gauss-Newton kept inside the domain ``1 + (1 - beta) k t > 0`` (singularity after the window).
- :func:`profile_interval`: where the profile crosses a threshold on each side of the optimum
  (grid bracket, then Illinois regula falsi); ``nan`` when it never does within the bounds.
"""
from __future__ import annotations

from collections.abc import Callable

import numpy as np

from pipeline.growth.laws import expm1_ratio, log1p_ratio

Array = np.ndarray
Model = Callable[[Array, Array], Array]

__all__ = ["levenberg_marquardt", "jacobian", "linear_start", "power_profile",
           "profile_interval", "gompertz_grid_start"]


def linear_start(t: Array, y: Array) -> tuple[Array, Array]:
    """Least-squares line ``y = a + b t`` per row: (intercept a, slope b)."""
    tm, ym = t.mean(-1, keepdims=True), y.mean(-1, keepdims=True)
    var = ((t - tm) ** 2).sum(-1)
    slope = np.where(var > 0, ((t - tm) * (y - ym)).sum(-1) / np.where(var > 0, var, 1.0), 0.0)
    return ym[..., 0] - slope * tm[..., 0], slope


def jacobian(model: Model, t: Array, theta: Array) -> Array:
    """Central-difference Jacobian ``d model / d theta`` of shape ``(M, n, p)``.

    Where one side leaves the model's domain (``nan``), the one-sided difference is used.
    """
    p = theta.shape[-1]
    f0 = model(t, theta)
    cols = []
    for j in range(p):
        h = 1e-6 * (1.0 + np.abs(theta[..., j]))
        up, down = theta.copy(), theta.copy()
        up[..., j] += h
        down[..., j] -= h
        fp, fm = model(t, up), model(t, down)
        d = (fp - fm) / (2 * h[..., None])
        d = np.where(np.isfinite(d), d, (fp - f0) / h[..., None])
        d = np.where(np.isfinite(d), d, (f0 - fm) / h[..., None])
        cols.append(np.where(np.isfinite(d), d, 0.0))
    return np.stack(cols, axis=-1)


def _rss(model: Model, t: Array, y: Array, theta: Array) -> Array:
    with np.errstate(all="ignore"):
        r = y - model(t, theta)
        c = (r * r).sum(-1)
    return np.where(np.isfinite(c), c, np.inf)


def levenberg_marquardt(model: Model, t: Array, y: Array, theta0: Array, lower: Array,
                        upper: Array, *, max_iter: int = 100) -> tuple[Array, Array]:
    """Minimise ``sum((y - model(t, theta))**2)`` for every row, within box bounds.

    Parameters
    ----------
    model : callable
        ``(t (m, n), theta (m, p)) -> (m, n)``.
    t, y : (M, n) ndarray
        Days since the window start; log-volumes.
    theta0, lower, upper : (M, p) ndarray
        Start (clipped into the box) and bounds.

    Returns
    -------
    theta : (M, p) ndarray
    rss : (M,) ndarray
        ``inf`` where no finite start was found.

    Examples
    --------
    >>> t = np.array([[0.0, 1.0, 2.0]]); y = 1.0 + 0.5 * t
    >>> th, rss = levenberg_marquardt(lambda t, th: th[:, :1] + th[:, 1:] * t, t, y,
    ...                               np.zeros((1, 2)), np.full((1, 2), -9.0), np.full((1, 2), 9.0))
    >>> th.round(8).tolist(), bool(rss[0] < 1e-20)
    ([[1.0, 0.5]], True)
    """
    theta = np.clip(np.asarray(theta0, float), lower, upper)
    cost = _rss(model, t, y, theta)
    lam = np.full(len(theta), 1e-3)
    active = np.isfinite(cost)
    p = theta.shape[-1]
    eye = np.eye(p)
    for _ in range(max_iter):
        idx = np.flatnonzero(active)
        if len(idx) == 0:
            break
        th, ti, yi = theta[idx], t[idx], y[idx]
        with np.errstate(all="ignore"):
            J = jacobian(model, ti, th)
            r = yi - model(ti, th)
            A = np.einsum("mnp,mnq->mpq", J, J)
            g = np.einsum("mnp,mn->mp", J, r)
            scale = np.einsum("mpp->mp", A) + 1e-12
            lhs = A + lam[idx, None, None] * scale[:, :, None] * eye
            step = np.linalg.solve(lhs, g[..., None])[..., 0]
        new = np.clip(th + step, lower[idx], upper[idx])
        new_cost = _rss(model, ti, yi, new)
        better = new_cost < cost[idx]
        gain = np.where(better, cost[idx] - new_cost, 0.0)
        theta[idx[better]] = new[better]
        cost[idx[better]] = new_cost[better]
        lam[idx] = np.where(better, np.maximum(lam[idx] * 0.3, 1e-12), lam[idx] * 10.0)
        moved = np.abs(new - th).max(-1)
        done = (better & ((gain <= 1e-12 * (cost[idx] + 1e-30)) | (moved < 1e-10))) | \
            (lam[idx] > 1e12) | ~np.isfinite(step).all(-1)
        active[idx[done]] = False
    return theta, cost


def gompertz_grid_start(t: Array, y: Array, c_max: float) -> Array:
    """Best ``(log_v0, k, c)`` on a grid of c with (log_v0, k) solved exactly (linear in them)."""
    span = np.maximum(t.max(-1), 1e-9)
    z = np.array([0.0, 0.25, 0.5, 1.0, 2.0, 4.0, 8.0])
    c = np.minimum(z[None, :] / span[:, None], c_max)                      # (M, G)
    h = t[:, None, :] * expm1_ratio(-c[..., None] * t[:, None, :])         # (M, G, n)
    hm, ym = h.mean(-1, keepdims=True), y[:, None, :].mean(-1, keepdims=True)
    var = ((h - hm) ** 2).sum(-1)
    k = np.where(var > 0, ((h - hm) * (y[:, None, :] - ym)).sum(-1) / np.maximum(var, 1e-300), 0)
    lv0 = ym[..., 0] - k * hm[..., 0]
    rss = ((y[:, None, :] - lv0[..., None] - k[..., None] * h) ** 2).sum(-1)
    best = np.argmin(np.where(np.isfinite(rss), rss, np.inf), axis=1)
    pick = np.arange(len(t))
    return np.stack([lv0[pick, best], k[pick, best], c[pick, best]], -1)


def _power_eval(t: Array, y: Array, u: Array, k: Array) -> tuple[Array, Array, Array]:
    """Centred residuals, centred d(model)/dk and RSS with log_v0 profiled out."""
    x = u[..., None] * k[..., None] * t
    with np.errstate(all="ignore"):
        g = k[..., None] * t * log1p_ratio(x)
        dg = t / (1.0 + x)
    r = y - g
    r = r - r.mean(-1, keepdims=True)
    dg = dg - dg.mean(-1, keepdims=True)
    rss = (r * r).sum(-1)
    return r, dg, np.where(np.isfinite(rss), rss, np.inf)


def power_profile(t: Array, y: Array, beta: Array, *, k_max: float,
                  iterations: int = 12) -> tuple[Array, Array, Array]:
    """Profile of the power law over beta: ``RSS(beta)`` minimised over ``(log_v0, k)``.

    Parameters
    ----------
    t, y : (M, n) ndarray
        Days since the window start (``t >= 0``) and log-volumes.
    beta : (M, G) ndarray
        Exponents to profile at.
    k_max : float
        Bound on ``|k|`` (1/day).

    Returns
    -------
    rss, log_v0, k : (M, G) ndarray

    Examples
    --------
    >>> t = np.array([[0.0, 1.0, 2.0]]); y = np.log([[1.0, 4.0, 9.0]])
    >>> rss, lv0, k = power_profile(t, y, np.array([[0.5, 1.0]]), k_max=5.0)
    >>> rss.round(12).tolist()[0][0], k.round(8).tolist()[0][0]
    (0.0, 2.0)
    """
    t3, y3 = t[:, None, :], y[:, None, :]
    u = 1.0 - beta
    tmax = t.max(-1)[:, None]
    intercept, slope = linear_start(t, y)
    span_gain = (slope * tmax[:, 0])[:, None]
    k = np.clip(slope[:, None] * expm1_ratio(u * span_gain), -k_max, k_max)
    # domain: 1 + u k t > 0 on [0, tmax]  <=>  u k > -1 / tmax
    with np.errstate(divide="ignore"):
        k_lo = np.where(u > 0, -1.0 / (u * tmax), -k_max)
        k_hi = np.where(u < 0, -1.0 / (u * tmax), k_max)
    k_lo, k_hi = np.maximum(k_lo, -k_max), np.minimum(k_hi, k_max)
    k = np.clip(k, k_lo + 1e-9 * np.abs(k_lo), k_hi - 1e-9 * np.abs(k_hi))
    r, dg, rss = _power_eval(t3, y3, u, k)
    damp = np.ones_like(k)
    for _ in range(iterations):
        den = (dg * dg).sum(-1)
        step = np.where(den > 0, (r * dg).sum(-1) / np.where(den > 0, den, 1.0), 0.0) * damp
        new = k + step
        # stay strictly inside the domain: go at most 90 % of the way to its edge
        new = np.where(new >= k_hi, k + 0.9 * (k_hi - k), new)
        new = np.where(new <= k_lo, k + 0.9 * (k_lo - k), new)
        r2, dg2, rss2 = _power_eval(t3, y3, u, new)
        better = rss2 < rss
        k = np.where(better, new, k)
        r = np.where(better[..., None], r2, r)
        dg = np.where(better[..., None], dg2, dg)
        rss = np.where(better, rss2, rss)
        damp = np.where(better, np.minimum(1.0, damp * 2.0), damp * 0.25)
    with np.errstate(all="ignore"):
        g = k[..., None] * t3 * log1p_ratio(u[..., None] * k[..., None] * t3)
    lv0 = (y3 - g).mean(-1)
    return rss, lv0, k


def profile_interval(profile: Callable[[Array, Array], Array], grid: Array, values: Array,
                     center: Array, threshold: Array, *, iterations: int = 20
                     ) -> tuple[Array, Array]:
    """Lower and upper crossing of ``profile(b) = threshold`` around ``center`` per row.

    ``grid`` (G,) with ``values`` (M, G) = profile on the grid. Returns ``nan`` on a side where
    the profile stays at or below the threshold up to the grid's end (unbounded interval).
    ``profile(b, rows)`` returns the profile at ``b`` (m,) for the row indices ``rows`` (m,).
    """
    m = len(values)
    out = []
    for side in (-1, 1):
        beyond = (values > threshold[:, None]) & ((grid[None, :] - center[:, None]) * side > 0)
        found = beyond.any(1)
        if side < 0:
            index = np.where(found, len(grid) - 1 - np.argmax(beyond[:, ::-1], 1), 0)
        else:
            index = np.where(found, np.argmax(beyond, 1), 0)
        outer = grid[index]
        inner = grid[np.clip(index - side, 0, len(grid) - 1)]   # next grid point inwards
        inner = np.where(side * (inner - center) < 0, center, inner)    # never past the optimum
        edge = np.full(m, np.nan)
        rows = np.flatnonzero(found)
        if len(rows):
            edge[rows] = _illinois(lambda b, r: profile(b, r) - threshold[r], outer[rows],
                                   inner[rows], rows, iterations)
        out.append(edge)
    return out[0], out[1]


def _illinois(f: Callable[[Array, Array], Array], a: Array, b: Array, rows: Array,
              iterations: int) -> Array:
    """Root of f in [a, b] per row (f(a) > 0 >= f(b)) by the Illinois variant of regula falsi."""
    fa, fb = f(a, rows), f(b, rows)
    for _ in range(iterations):
        denom = fa - fb
        c = np.where(np.abs(denom) > 0, b - fb * (b - a) / np.where(denom != 0, denom, 1.0),
                     0.5 * (a + b))
        c = np.where(np.isfinite(c) & ((c - a) * (c - b) <= 0), c, 0.5 * (a + b))
        fc = f(c, rows)
        same = np.sign(fc) == np.sign(fb)
        # Illinois: halve the retained end's value when the same end is kept twice
        fa = np.where(same, fa * 0.5, fb)
        a = np.where(same, a, b)
        b, fb = c, fc
        if np.all(np.abs(a - b) < 1e-6):
            break
    return b
