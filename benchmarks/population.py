"""Population model: speed (2000 lesions x 5 sessions, every law, with intervals) and coverage.

Prints figures measured in one run; nothing here is a test. Usage::

    python benchmarks/population.py speed [--lesions 2000] [--sessions 5]
    python benchmarks/population.py coverage [--replicates 20] [--lesions 100]

``speed`` times :func:`pipeline.growth.population.population_tables` (every law, intervals,
forecasts, no backtest) beside the per-lesion fits
(:func:`pipeline.growth.lesion_fits.fit_lesions`) and, for the
exponential law, beside statsmodels MixedLM on the same data (the tests' reference).
``coverage`` simulates power-law cohorts (beta ~ N(1.1, 0.1), k log-normal, 10 % ln-volume
error, sessions every 60 days, two lesions per subject) and counts how often the 95 % intervals
cover the truth: individual beta, population mean beta, forecast at the next session.
"""
from __future__ import annotations

import argparse
import time

import numpy as np
import pandas as pd
from scipy import stats

from pipeline.growth.lesion_fits import fit_lesions
from pipeline.growth.laws import LAWS
from pipeline.growth.population_model import (_arrays, fit_cohort, individual_cov, lesion_series,
                                               predict)
from pipeline.growth.population import population_tables
from pipeline.settings import FitSettings, PopulationSettings


def simulate(m: int, n: int, seed: int, *, beta: float = 1.1, beta_sd: float = 0.1,
             sigma: float = 0.1, extra: int = 0) -> tuple[pd.DataFrame, np.ndarray, pd.DataFrame]:
    """Phased rows of ``m`` lesions x ``n`` sessions, true parameters, ``extra`` later sessions."""
    rng = np.random.default_rng(seed)
    days = np.arange(n + extra) * 60.0
    phi = np.column_stack([np.log(500) + rng.normal(0, 1, m),
                           0.006 * np.exp(rng.normal(0, 0.3, m)), beta + rng.normal(0, beta_sd, m)])
    lv = LAWS["power"].log_volume(np.tile(days, (m, 1)), phi) + rng.normal(0, sigma, (m, len(days)))
    rows = pd.DataFrame({"subject": np.repeat([f"s{i // 2}" for i in range(m)], len(days)),
                         "lesion": np.repeat(np.arange(m) % 2 + 1, len(days)),
                         "phase": "untreated", "day": np.tile(days, m),
                         "volume_mm3": np.exp(lv.ravel()), "in_fit": True, "group": ""})
    later = rows[rows["day"] >= n * 60.0]
    return rows[rows["day"] < n * 60.0], phi, later


def speed(m: int, n: int) -> None:
    rows, _, _ = simulate(m, n, 0)
    t0 = time.perf_counter()
    population_tables(rows, population=PopulationSettings(backtest=False))
    t_pop = time.perf_counter() - t0
    t0 = time.perf_counter()
    fit_lesions(rows, settings=FitSettings())
    t_ind = time.perf_counter() - t0
    print(f"{m} lesions x {n} sessions, every law: population model {t_pop:.1f} s, "
          f"per-lesion fits {t_ind:.1f} s (ratio {t_pop / t_ind:.1f})")
    try:
        import statsmodels.api as sm
    except ImportError:
        print("statsmodels not installed: no reference timing")
        return
    a = _arrays(lesion_series(rows))
    t0 = time.perf_counter()
    fit_cohort(LAWS["exponential"], a, covariance="full")
    t_exp = time.perf_counter() - t0
    X = np.column_stack([np.ones(a["t"].size), a["t"].ravel() / 100.0])
    t0 = time.perf_counter()
    sm.MixedLM(a["y"].ravel(), X, groups=np.repeat(np.arange(len(a["t"])), n),
               exog_re=X).fit(reml=False)
    t_ref = time.perf_counter() - t0
    print(f"exponential law, full covariance: ours {t_exp:.2f} s, statsmodels MixedLM "
          f"{t_ref:.2f} s")


def coverage(replicates: int, m: int) -> None:
    settings = FitSettings()
    print("sessions  individual_beta  population_mean_beta  forecast_next  mean_shrinkage")
    for n in (3, 4, 5, 8):
        hits = {"ind": [], "mean": [], "fc": [], "shrink": []}
        for rep in range(replicates):
            rows, phi, later = simulate(m, n, 1000 * n + rep, extra=1)
            a = _arrays(lesion_series(rows))
            order = 2 * a["ids"]["subject"].str[1:].astype(int).to_numpy() + \
                a["ids"]["lesion"].to_numpy() - 1               # simulated lesion index
            phi = phi[order]
            truth = np.log(later["volume_mm3"].to_numpy())[order]
            fit, _ = fit_cohort(LAWS["power"], a, settings=settings)
            cov = individual_cov(fit)
            half = 1.959964 * np.sqrt(cov[:, 2, 2])
            hits["ind"].append(np.abs(fit.modes[:, 2] - phi[:, 2]) <= half)
            sd = np.sqrt(fit.mu_cov[2, 2])
            q = stats.t.ppf(0.975, fit.n_clusters - 1)
            hits["mean"].append([abs(fit.mu[2] - 1.1) <= q * sd])
            centre, low, high, _ = predict(LAWS["power"], fit, cov, np.full(m, n * 60.0),
                                           confidence=0.95)
            hits["fc"].append((truth >= low) & (truth <= high))
            hits["shrink"].append(np.clip(fit.cond_cov[:, 2, 2] / fit.omega[2, 2], 0, 1))
        share = {k: float(np.mean(np.concatenate(v))) for k, v in hits.items()}
        print(f"{n:8d}  {share['ind']:15.3f}  {share['mean']:20.3f}  {share['fc']:13.3f}  "
              f"{share['shrink']:14.3f}")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("what", choices=("speed", "coverage"))
    parser.add_argument("--lesions", type=int, default=None)
    parser.add_argument("--sessions", type=int, default=5)
    parser.add_argument("--replicates", type=int, default=20)
    args = parser.parse_args()
    if args.what == "speed":
        speed(args.lesions or 2000, args.sessions)
    else:
        coverage(args.replicates, args.lesions or 100)


if __name__ == "__main__":
    main()
