"""Group fits: one growth exponent shared by every lesion of a (group, phase).

A per-lesion exponent from 3-5 sessions is fragile; pooling lesions restores identifiability.
For each (group, phase) the power law dV/dt = alpha * V^beta is fitted jointly to all lesions with
at least ``min_sessions`` fitted sessions in that phase: every lesion keeps its own volume at its
first fitted day (V0) and its own initial specific growth rate k = alpha * V0^(beta - 1) (per day),
while beta is shared. The fit is least squares in log-volume (multiplicative error):

    ln V(t) = ln V0 + log1p((1 - beta) k t) / (1 - beta),   t = day - lesion's first fitted day,

solved as one sparse problem (``scipy.optimize.least_squares`` with ``jac_sparsity``: the lesion
parameters are block-diagonal, beta couples every residual), started from the best beta of a
coarse profile so that a local minimum is not taken for the answer. The confidence interval of
beta is a profile-likelihood interval: every lesion's (V0, k) is re-optimised at each trial beta
(vectorised over lesions: V0 in closed form, k by Gauss-Newton), with an F(1, dof) threshold when
sigma is estimated and chi2(1) when ``FitSettings.measurement_error`` fixes it. Beta's bounds,
the interval level and the bound on |k| come from ``FitSettings``. BLAS is pinned to one thread
while solving when threadpoolctl is installed.

Research use only: see ``pipeline.DISCLAIMER``.

References
----------
Closed form and the k parameterisation: docs/methods.md §1.1 (standard calculus).
Shared-exponent joint least squares: docs/methods.md §1.7.
Profile likelihood with an F threshold: Bates DM, Watts DG. Nonlinear Regression Analysis and Its
Applications. Wiley 1988; Venzon DJ, Moolgavkar SH. Appl Stat 1988;37:87-94.
"""
from __future__ import annotations

from contextlib import AbstractContextManager, nullcontext
from dataclasses import dataclass

import numpy as np
import pandas as pd
from scipy import optimize, sparse, stats

from pipeline.errors import UsageError
from pipeline.growth.fit_table import GROUP_COLUMNS as COLUMNS  # noqa: F401 - its table
from pipeline.settings import FitSettings

try:  # optional: pins BLAS to one thread around the solver (see _one_blas_thread)
    from threadpoolctl import threadpool_limits
except ImportError:  # pragma: no cover - without it the BLAS thread count is left as it is
    threadpool_limits = None

_DEFAULT_SETTINGS = FitSettings()  # frozen, so one shared default is safe

_Z_FLOOR = 1e-9  # smallest 1 + (1 - beta) k t treated as the closed form; below: linear extension
_SMALL_U = 1e-10  # |1 - beta| below this uses the series of log1p(u x) / u


@dataclass(frozen=True)
class _Cohort:
    """Lesion series of one (group, phase) as padded arrays, sessions x lesions.

    Padding sits at tau = 0 and y = 0, where the model term is 0 too, so padded cells add nothing
    to sums of y - g; ``weight`` (1 real, 0 padded) masks everything else.
    """

    tau: np.ndarray     # time since the lesion's first fitted day / its window length, in [0, 1]
    y: np.ndarray       # natural-log volume (0 where padded)
    weight: np.ndarray  # 1.0 where a real observation sits, else 0.0
    span: np.ndarray    # window length per lesion, days
    subjects: np.ndarray

    @property
    def n_lesions(self) -> int:
        return int(self.tau.shape[1])

    @property
    def n_points(self) -> int:
        return int(self.weight.sum())

    @property
    def counts(self) -> np.ndarray:
        return self.weight.sum(axis=0)


# ---------------------------------------------------------------- the law in log-volume
def _log_growth(tau: np.ndarray, kappa: np.ndarray, beta: float) -> tuple[np.ndarray, np.ndarray]:
    """ln(V / V0) and its derivative in kappa for the power law in scaled time.

    ``kappa`` = k * span (unit-free rate), ``tau`` = t / span. Below ``_Z_FLOOR`` the logarithm of
    z = 1 + (1 - beta) kappa tau is continued linearly, so residuals stay finite and monotone past
    the singularity (the optimiser is pushed back; a solution there is flagged, never reported as
    valid).
    """
    u = 1.0 - beta
    x = kappa * tau
    if abs(u) < _SMALL_U:  # exponential limit: log1p(u x)/u = x - u x^2/2 + O(u^2)
        return x - 0.5 * u * x * x, tau / (1.0 + u * x)
    z = 1.0 + u * x
    safe = z > _Z_FLOOR
    zc = np.where(safe, z, _Z_FLOOR)
    logz = np.where(safe, np.log1p(np.where(safe, u * x, 0.0)),
                    np.log(_Z_FLOOR) + (z - _Z_FLOOR) / _Z_FLOOR)
    return logz / u, tau / zc


def _kappa_limits(beta: float) -> tuple[float, float]:
    """Range of kappa that keeps 1 + (1 - beta) kappa tau > 0 for tau in [0, 1]."""
    u = 1.0 - beta
    margin = 1.0 - 1e-6
    if u < -_SMALL_U:
        return -np.inf, margin / -u
    if u > _SMALL_U:
        return -margin / u, np.inf
    return -np.inf, np.inf


# ---------------------------------------------------------------- profile at fixed beta
def _profile(cohort: _Cohort, beta: float, kappa: np.ndarray, *, max_iter: int = 60,
             tol: float = 1e-10, max_rate: float = np.inf) -> tuple[float, np.ndarray, np.ndarray]:
    """Minimise every lesion's RSS over (ln V0, kappa) at a fixed beta, all lesions at once.

    ln V0 is eliminated in closed form (mean residual), kappa by Gauss-Newton with step halving
    for lesions whose RSS would rise and a cap that keeps 1 + (1 - beta) kappa tau > 0.
    ``max_rate`` bounds |k| (per day). Returns (total RSS, kappa, ln V0).
    """
    w, n = cohort.weight, cohort.counts
    lo, hi = _kappa_limits(beta)
    lo = np.maximum(lo, -max_rate * cohort.span)
    hi = np.minimum(hi, max_rate * cohort.span)
    kappa = np.clip(kappa, lo, hi)

    def evaluate(kap: np.ndarray) -> tuple[np.ndarray, np.ndarray, np.ndarray]:
        g, h = _log_growth(cohort.tau, kap, beta)
        e = cohort.y - g                      # 0 in padded cells
        r = (e - e.sum(axis=0) / n) * w
        hc = (h - (h * w).sum(axis=0) / n) * w
        return (r * r).sum(axis=0), r, hc

    rss, r, hc = evaluate(kappa)
    for _ in range(max_iter):
        step = (r * hc).sum(axis=0) / np.maximum((hc * hc).sum(axis=0), 1e-300)
        new = np.clip(kappa + step, kappa + 0.5 * (lo - kappa), kappa + 0.5 * (hi - kappa))
        new_rss, new_r, new_hc = evaluate(new)
        for _ in range(40):  # halve the step of lesions whose RSS went up
            worse = new_rss > rss * (1 + 1e-12)
            if not worse.any():
                break
            new = np.where(worse, 0.5 * (kappa + new), new)
            new_rss, new_r, new_hc = evaluate(new)
        done = np.abs(new - kappa) <= tol * (1.0 + np.abs(kappa))
        kappa, rss, r, hc = new, new_rss, new_r, new_hc
        if done.all():
            break
    g, _ = _log_growth(cohort.tau, kappa, beta)
    log_v0 = (cohort.y - g).sum(axis=0) / n
    return float(rss.sum()), kappa, log_v0


# ---------------------------------------------------------------- joint sparse least squares
def _structure(cohort: _Cohort) -> tuple[np.ndarray, np.ndarray]:
    """Lesion index of every residual and the flat positions of the observations."""
    real = cohort.weight > 0
    lesion = np.broadcast_to(np.arange(cohort.n_lesions), real.shape)[real]
    return lesion, np.flatnonzero(real)


def _joint_fit(cohort: _Cohort, log_v0: np.ndarray, kappa: np.ndarray, beta: float,
               bounds: tuple[float, float], *, max_rate: float = np.inf,
               sparse_jac: bool = True) -> optimize.OptimizeResult:
    """All lesions' (ln V0, kappa) and the shared beta in one least-squares problem."""
    n_les = cohort.n_lesions
    lesion, flat = _structure(cohort)
    tau, y = cohort.tau.ravel()[flat], cohort.y.ravel()[flat]

    def residuals(p: np.ndarray) -> np.ndarray:
        g, _ = _log_growth(tau, p[n_les + lesion], p[-1])
        return p[lesion] + g - y

    rows = np.arange(lesion.size)
    pattern = sparse.csr_matrix(
        (np.ones(3 * lesion.size), (np.concatenate([rows, rows, rows]),
                                    np.concatenate([lesion, n_les + lesion,
                                                    np.full(lesion.size, 2 * n_les)]))),
        shape=(lesion.size, 2 * n_les + 1))
    rate = max_rate * cohort.span
    lower = np.concatenate([np.full(n_les, -np.inf), -rate, [bounds[0]]])
    upper = np.concatenate([np.full(n_les, np.inf), rate, [bounds[1]]])
    x0 = np.concatenate([log_v0, np.clip(kappa, -rate, rate), [np.clip(beta, *bounds)]])
    return optimize.least_squares(
        residuals, x0, jac_sparsity=pattern if sparse_jac else None, bounds=(lower, upper),
        method="trf", x_scale="jac", ftol=1e-10, xtol=1e-10, gtol=1e-10, max_nfev=200,
        tr_options={"atol": 1e-10, "btol": 1e-10})


# ---------------------------------------------------------------- interval
@dataclass(frozen=True)
class _Options:
    bounds: tuple[float, float]   # box of beta
    confidence: float             # level of the interval
    sigma: float                  # known SD of log-volume error; 0 = unknown (F-based interval)
    max_rate: float               # |k| bound, 1/day


def _reference(rss_min: float, dof: int, options: _Options) -> tuple[float, float, str]:
    """(scale, threshold, method) of the profile test: F with estimated sigma, chi2 with known."""
    if options.sigma > 0:
        return options.sigma ** 2, float(stats.chi2.ppf(options.confidence, 1)), "chi2"
    return rss_min / dof, float(stats.f.ppf(options.confidence, 1, dof)), "F"


def _profile_interval(cohort: _Cohort, beta_hat: float, kappa_hat: np.ndarray, rss_min: float,
                      dof: int, options: _Options) -> tuple[float, float]:
    """Profile-likelihood interval of the shared beta; NaN for an unbounded side."""
    scale, threshold, _ = _reference(rss_min, dof, options)
    warm: dict[str, np.ndarray] = {}  # last kappa on each side: warm start of the next profile

    def excess(beta: float, side: str) -> float:
        rss, warm[side], _ = _profile(cohort, beta, warm.get(side, kappa_hat),
                                      max_rate=options.max_rate)
        return (rss - rss_min) / scale - threshold

    ends = []
    for side, limit in (("low", options.bounds[0]), ("high", options.bounds[1])):
        ends.append(_crossing(lambda b, side=side: excess(b, side), beta_hat, limit, threshold))
    return ends[0], ends[1]


def _crossing(excess, start: float, limit: float, threshold: float) -> float:
    """Where ``excess`` (negative at ``start``) turns positive before ``limit``; NaN if never.

    The first probe is 0.01 away; a quadratic profile through it predicts the crossing, and the
    search steps out from there (at least doubling) until the sign changes, then refines with
    Brent's method.
    """
    direction = np.sign(limit - start)
    inner, delta = start, min(0.01, abs(limit - start))
    while delta > 1e-12:
        outer = start + direction * delta
        value = excess(outer)
        if value > 0:
            return float(optimize.brentq(excess, inner, outer, xtol=1e-5))
        if abs(outer - limit) <= 1e-12:
            return float("nan")
        predicted = delta * np.sqrt(threshold / max(value + threshold, 1e-12 * threshold))
        inner, delta = outer, min(max(1.1 * predicted, 2 * delta), abs(limit - start))
    return float("nan")


# ---------------------------------------------------------------- one (group, phase)
def _start(cohort: _Cohort, options: _Options) -> tuple[float, np.ndarray, np.ndarray]:
    """Start values: the best point of a coarse profile over beta (guards against a local
    minimum), refined by a loose bounded scalar search between its neighbours."""
    rate = options.max_rate
    kappa0 = _profile(cohort, 1.0, np.zeros(cohort.n_lesions), max_iter=10, max_rate=rate)[1]
    grid = np.unique(np.clip([-1.0, 0.0, 0.5, 0.8, 1.0, 1.25, 1.6, 2.2, 3.0, *options.bounds],
                             *options.bounds))
    rss = [_profile(cohort, float(b), kappa0, max_iter=10, max_rate=rate)[0] for b in grid]
    best = int(np.argmin(rss))
    lo, hi = grid[max(best - 1, 0)], grid[min(best + 1, len(grid) - 1)]
    warm = [kappa0]

    def rss_at(beta: float) -> float:
        rss, warm[0], _ = _profile(cohort, beta, warm[0], max_iter=20, max_rate=rate)
        return rss

    search = optimize.minimize_scalar(rss_at, bounds=(lo, hi), method="bounded",
                                      options={"xatol": 1e-3})
    _, kappa, log_v0 = _profile(cohort, float(search.x), warm[0], max_rate=rate)
    return float(search.x), kappa, log_v0


def _solve(cohort: _Cohort, options: _Options) -> tuple[float, np.ndarray, float, list[str]]:
    """Joint fit: (beta, kappa per lesion, RSS, problems found)."""
    n_les = cohort.n_lesions
    b0, kappa0, log_v0 = _start(cohort, options)
    result = _joint_fit(cohort, log_v0, kappa0, b0, options.bounds, max_rate=options.max_rate)
    beta = float(result.x[-1])
    rss, kappa, _ = _profile(cohort, beta, result.x[n_les:2 * n_les], max_rate=options.max_rate)
    problems = [] if result.success else [f"least-squares solver stopped: {result.message}"]
    return beta, kappa, min(rss, float(2 * result.cost)), problems


def _fit_cohort(cohort: _Cohort, options: _Options) -> dict:
    """Fit one cohort; return the numeric part of its group_fits row."""
    dof = cohort.n_points - (2 * cohort.n_lesions + 1)
    beta, kappa, rss_min, notes = _solve(cohort, options)
    lo_k, hi_k = _kappa_limits(beta)
    singular = int(np.sum((kappa >= hi_k) | (kappa <= lo_k)))
    if singular:
        notes.append(f"{singular} lesion(s) would reach the singularity inside their window")
    row = {"beta": beta, "rss_log": rss_min, "dof": dof, "n_singular": singular,
           "sigma_log": float(np.sqrt(rss_min / dof)) if dof > 0 else np.nan,
           "status": "failed" if notes else "ok"}
    if options.sigma <= 0 and dof <= 0:
        notes.append("no residual degrees of freedom and no measurement error set: no interval")
        return {**row, "status": "exact" if row["status"] == "ok" else row["status"],
                "note": "; ".join(notes)}
    if options.sigma <= 0 and rss_min <= 1e-24 * cohort.n_points:
        return {**row, "note": "; ".join([*notes, "residuals are zero: interval not defined"])}
    low, high = _profile_interval(cohort, beta, kappa, rss_min, dof, options)
    row.update(beta_ci_low=low, beta_ci_high=high, ci_method=_reference(rss_min, dof, options)[2])
    for value, side, limit in ((low, "lower", options.bounds[0]),
                               (high, "upper", options.bounds[1])):
        if np.isnan(value):
            notes.append(f"interval unbounded on the {side} side within the beta bound {limit:g}")
    if min(abs(beta - options.bounds[0]), abs(beta - options.bounds[1])) < 1e-6:
        notes.append("beta at its bound: the optimum may lie outside beta_bounds")
        row["status"] = "at-bound" if row["status"] == "ok" else row["status"]
    row["p_exponential"] = _p_exponential(cohort, kappa, rss_min, dof, options)
    return {**row, "note": "; ".join(notes)}


def _p_exponential(cohort: _Cohort, kappa: np.ndarray, rss_min: float, dof: int,
                   options: _Options) -> float:
    """Profile-likelihood test of beta = 1 against the free shared beta."""
    if not options.bounds[0] <= 1.0 <= options.bounds[1]:
        return float("nan")
    statistic = max(_profile(cohort, 1.0, kappa, max_rate=options.max_rate)[0] - rss_min, 0.0)
    scale, _, method = _reference(rss_min, dof, options)
    if method == "chi2":
        return float(stats.chi2.sf(statistic / scale, 1))
    return float(stats.f.sf(statistic / scale, 1, dof))


# ---------------------------------------------------------------- table front end
_REQUIRED = ("subject", "lesion", "day", "volume_mm3", "phase", "in_fit")
_ORDER = ("group", "phase", "model", "n_lesions", "n_points", "beta", "beta_ci_low",
          "beta_ci_high", "n_subjects", "rss_log", "dof", "sigma_log", "confidence", "ci_method",
          "p_exponential", "median_fold_change", "n_singular", "status", "note")


def _check_phased(phased: pd.DataFrame) -> None:
    missing = [c for c in _REQUIRED if c not in phased.columns]
    if missing:
        raise UsageError(f"the phased longitudinal table lacks columns {missing}; expected the "
                         "output of pipeline.growth.phases.assign_phases (with 'phase' and "
                         "'in_fit')")


def _as_bool(column: pd.Series) -> pd.Series:
    if column.dtype == bool:
        return column
    text = column.astype(str).str.strip().str.lower()
    known = text.isin(["true", "false", "1", "0", "1.0", "0.0"])
    if not known.all():
        raise ValueError(f"in_fit must be true/false; got {column[~known].iloc[0]!r}")
    return text.isin(["true", "1", "1.0"])


def _resolve(settings: FitSettings, beta_bounds: tuple[float, float] | None,
             confidence: float | None) -> _Options:
    """Keyword value, else the FitSettings field of that name if present, else the default."""
    bounds = beta_bounds or getattr(settings, "beta_bounds", None) or (-1.0, 3.0)
    level = confidence or getattr(settings, "confidence", None) or 0.95
    lo, hi = float(bounds[0]), float(bounds[1])
    if not np.isfinite([lo, hi]).all() or not lo < 1.0 < hi:
        raise ValueError(f"beta bounds must be finite with low < 1 < high; got {bounds}")
    if not 0.0 < level < 1.0:
        raise ValueError(f"confidence must lie between 0 and 1; got {level}")
    return _Options(bounds=(lo, hi), confidence=float(level),
                    sigma=float(getattr(settings, "measurement_error", 0.0) or 0.0),
                    max_rate=float(getattr(settings, "max_rate_per_day", np.inf) or np.inf))


def _usable_rows(phased: pd.DataFrame) -> tuple[pd.DataFrame, int]:
    """In-fit rows with a positive finite volume, group '' -> 'all'; count of refused rows."""
    rows = phased.loc[_as_bool(phased["in_fit"]), list(_REQUIRED[:5])].copy()
    group = phased.loc[rows.index, "group"] if "group" in phased else pd.Series("", rows.index)
    rows["group"] = group.fillna("").astype(str).str.strip().replace("", "all")
    rows["subject"] = rows["subject"].astype(str)
    rows["phase"] = rows["phase"].astype(str)
    volume = pd.to_numeric(rows["volume_mm3"], errors="coerce")
    day = pd.to_numeric(rows["day"], errors="coerce")
    good = np.isfinite(volume) & (volume > 0) & np.isfinite(day)
    rows["volume_mm3"], rows["day"] = volume, day
    return rows[good], int((~good).sum())


def _cohort(rows: pd.DataFrame) -> _Cohort:
    """Padded arrays of one (group, phase); rows already filtered to qualifying lesions."""
    rows = rows.sort_values(["subject", "lesion", "day"], kind="stable")
    key = rows.groupby(["subject", "lesion"], sort=False).ngroup().to_numpy()
    pos = rows.groupby(["subject", "lesion"], sort=False).cumcount().to_numpy()
    n_les, width = key.max() + 1, pos.max() + 1
    day = rows["day"].to_numpy(float)
    first = np.full(n_les, np.inf)
    last = np.full(n_les, -np.inf)
    np.minimum.at(first, key, day)
    np.maximum.at(last, key, day)
    span = last - first
    tau, y, weight = np.zeros((width, n_les)), np.zeros((width, n_les)), np.zeros((width, n_les))
    tau[pos, key] = (day - first[key]) / span[key]
    y[pos, key] = np.log(rows["volume_mm3"].to_numpy(float))
    weight[pos, key] = 1.0
    subjects = rows["subject"].to_numpy()[np.r_[0, np.flatnonzero(np.diff(key)) + 1]]
    return _Cohort(tau=tau, y=y, weight=weight, span=span, subjects=subjects)


def _qualifying(rows: pd.DataFrame, min_sessions: int) -> tuple[pd.DataFrame, int]:
    """Lesions with >= min_sessions sessions on distinct days; counts of too-short lesions."""
    by = rows.groupby(["subject", "lesion"], sort=False)
    n_sessions = by["day"].transform("size")
    n_days = by["day"].transform("nunique")
    keep = (n_sessions >= min_sessions) & (n_days >= 2)
    short = rows.loc[~keep, ["subject", "lesion"]].drop_duplicates()
    return rows[keep], len(short)


def _without_change(rows: pd.DataFrame) -> tuple[pd.DataFrame, int]:
    """Drop lesions whose volume is identical at every fitted session; count them.

    Such a series is fitted exactly by k = 0 at every beta: it says nothing about beta, and its
    zero residuals would add degrees of freedom without residual, shrinking the pooled error
    variance and so the interval of beta (with a configured error it changes nothing).
    """
    volume = rows.groupby(["subject", "lesion"], sort=False)["volume_mm3"]
    flat = (volume.transform("max") == volume.transform("min")).to_numpy()
    dropped = rows.loc[flat, ["subject", "lesion"]].drop_duplicates()
    return rows[~flat], len(dropped)


def _one_blas_thread() -> AbstractContextManager:
    """One BLAS thread while solving: the solver only calls BLAS on long vectors, where a
    second thread competing for a busy core made fits many times slower (measured in
    benchmarks/fit.py)."""
    if threadpool_limits is None:
        return nullcontext()
    return threadpool_limits(limits=1, user_api="blas")


def fit_groups(phased: pd.DataFrame, *, settings: FitSettings = _DEFAULT_SETTINGS,
               beta_bounds: tuple[float, float] | None = None, confidence: float | None = None,
               min_sessions: int = 3) -> pd.DataFrame:
    """Fit one shared growth exponent per (group, phase) to all its lesions at once.

    Parameters
    ----------
    phased : pandas.DataFrame
        Longitudinal rows with ``phase`` and ``in_fit`` (``pipeline.growth.phases.assign_phases``):
        ``subject``, ``lesion``, ``day`` (days), ``volume_mm3`` (mm^3), ``phase``, ``in_fit``,
        optional ``group`` ('' or missing means the group ``all``). Only ``in_fit`` rows are used.
    settings : FitSettings
        Read for ``beta_bounds`` and ``confidence`` when it has such fields.
    beta_bounds : (float, float), optional
        Box for beta, low < 1 < high (default (-1, 3)).
    confidence : float, optional
        Level of the profile-likelihood interval (default 0.95).
    min_sessions : int
        A lesion joins its (group, phase) with at least this many fitted sessions (docs/outputs.md
        §4.8: 3).

    Returns
    -------
    pandas.DataFrame
        One row per (group, phase) seen among the fitted rows; columns as in ``COLUMNS``.

    Notes
    -----
    A lesion whose volume is the same at every fitted session is left out (with a note): it is
    fitted exactly at any beta, so it carries no information on beta, and its zero residuals
    would shrink the pooled error estimate. Time runs from each lesion's first fitted day in
    the phase, so V0 is the fitted volume on that
    day and k the initial specific growth rate (per day). A fit in which a lesion's finite-time
    singularity (beta > 1) would fall inside its window is reported as ``failed``. Lesions of one
    subject are treated as independent given the law; beta's interval ignores that clustering.
    Research use only; not a medical device.

    Examples
    --------
    >>> days = np.array([0.0, 60.0, 120.0, 180.0])
    >>> law = lambda v0, k: v0 * np.exp(np.log1p((1 - 0.8) * k * days) / (1 - 0.8))
    >>> rows = [dict(subject=f"s{i}", lesion=1, day=d, volume_mm3=v, phase="untreated",
    ...              in_fit=True) for i, (v0, k) in enumerate([(50, .01), (300, .02), (80, .015)])
    ...         for d, v in zip(days, law(v0, k) * np.exp([.01, -.01, .01, -.01]))]
    >>> fit = fit_groups(pd.DataFrame(rows))
    >>> fit[["group", "phase", "n_lesions", "n_points", "status"]].values.tolist()
    [['all', 'untreated', 3, 12, 'ok']]
    >>> round(float(fit.beta.iloc[0]), 1)
    0.8
    """
    _check_phased(phased)
    options = _resolve(settings, beta_bounds, confidence)
    rows, refused = _usable_rows(phased)
    out = []
    for (group, phase), part in rows.groupby(["group", "phase"], sort=True):
        kept, short = _qualifying(part, min_sessions)
        kept, flat = _without_change(kept)
        notes = [(f"{short} lesion(s) with fewer than {min_sessions} fitted sessions (or all "
                  "on one day) left out")] if short else []
        if flat:
            notes.append(f"{flat} lesion(s) with the same volume at every fitted session left "
                         "out: no information on beta, and their zero residuals would narrow "
                         "the interval")
        row = {"group": group, "phase": phase, "model": "power", "confidence": options.confidence,
               "n_lesions": 0, "n_points": 0, "n_subjects": 0}
        if kept.empty:
            out.append({**row, "status": "no-lesions", "note": "; ".join(notes)})
            continue
        cohort = _cohort(kept)
        last = cohort.y[cohort.counts.astype(int) - 1, np.arange(cohort.n_lesions)]
        row.update(n_lesions=cohort.n_lesions, n_points=cohort.n_points,
                   n_subjects=len(np.unique(cohort.subjects)),
                   median_fold_change=float(np.median(np.exp(last - cohort.y[0]))))
        with _one_blas_thread():
            fitted = _fit_cohort(cohort, options)
        fitted["note"] = "; ".join([n for n in [fitted["note"], *notes] if n])
        out.append({**row, **fitted})
    if refused:
        for row in out:
            extra = f"{refused} in-fit row(s) without a positive volume or a day left out"
            row["note"] = "; ".join(n for n in [row["note"], extra] if n)
    return _frame(out)


def _frame(rows: list[dict]) -> pd.DataFrame:
    table = pd.DataFrame(rows, columns=list(_ORDER))
    for name in ("n_lesions", "n_points", "n_subjects"):
        table[name] = table[name].astype("int64")
    for name in ("dof", "n_singular"):
        table[name] = table[name].astype("Int64")
    return table
