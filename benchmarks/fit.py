"""Stage-3 speed: the tool's per-lesion and group fits next to a naive scipy curve_fit loop.

Run: python benchmarks/fit.py [--lesions 2000] [--sessions 5] [--repeats 5] [--seed 0]

Generates its own invented series (power law with a known beta, log-normal noise, seeded), then
in one process times:
  per-lesion  pipeline.growth.fit_lesions: every law in FitSettings().models, with intervals
  curve_fit   a naive loop of scipy.optimize.curve_fit over the same lesions (power law only,
              one start from the exponential fit, no intervals)
  group       pipeline.growth.group_fits.fit_groups: one shared beta for all lesions, with its
  interval
checks that the tool's per-lesion betas agree with the curve_fit loop wherever both reach the same
least-squares optimum (|delta RSS| <= 1e-6 * (1 + RSS); then |delta beta| <= 1e-3), and that the
group beta agrees (|delta beta| <= 1e-3) with a nested curve_fit profile on a subset. It also
times the group fit with BLAS left at its default thread count, with and without one core kept
busy by a second process, to show whether pinning BLAS to one thread matters.
Prints medians and min-max over repeats; the last line states the figures. Figures, not a test:
nothing here asserts speed.
"""
from __future__ import annotations

import argparse
import contextlib
import os
import statistics
import subprocess
import sys
import time
import warnings
from pathlib import Path

import numpy as np
import pandas as pd
from scipy import optimize

sys.path.insert(0, str(Path(__file__).resolve().parents[1]))

from pipeline.growth import group_fits as groupfit  # noqa: E402
from pipeline.settings import FitSettings  # noqa: E402

try:
    from pipeline.growth.lesion_fits import fit_lesions  # noqa: E402
except ImportError as exc:  # the per-lesion stage may be missing from a partial checkout
    fit_lesions, MISSING = None, f"pipeline.growth.fit_lesions not importable ({exc})"
else:
    MISSING = ""

try:
    from threadpoolctl import threadpool_info, threadpool_limits  # noqa: E402
except ImportError:
    threadpool_info = threadpool_limits = None

BETA_TOL, RSS_TOL, GROUP_TOL = 1e-3, 1e-6, 1e-3


def simulate(n_lesions: int, n_sessions: int, *, beta: float = 0.8, sigma: float = 0.1,
             seed: int = 0) -> pd.DataFrame:
    """Phased longitudinal rows: 2 lesions per subject, log-fold growth 0.7-3 over 120-480 days."""
    rng = np.random.default_rng(seed)
    v0 = np.exp(rng.uniform(np.log(20.0), np.log(2000.0), n_lesions))
    steps = rng.uniform(30.0, 120.0, (n_lesions, n_sessions - 1))
    days = np.concatenate([np.zeros((n_lesions, 1)), np.cumsum(steps, axis=1)], axis=1)
    u = 1.0 - beta
    k = np.expm1(u * rng.uniform(0.7, 3.0, n_lesions)) / (u * days[:, -1])
    volume = v0[:, None] * np.exp(np.log1p(u * k[:, None] * days) / u)
    volume *= np.exp(rng.normal(0.0, sigma, volume.shape))
    lesion_ids = np.arange(n_lesions)
    return pd.DataFrame({
        "subject": np.repeat([f"sim{i // 2:05d}" for i in lesion_ids], n_sessions),
        "lesion": np.repeat(lesion_ids % 2 + 1, n_sessions),
        "session": np.tile([f"{j + 1:02d}" for j in range(n_sessions)], n_lesions),
        "day": days.ravel(), "volume_mm3": volume.ravel(), "status": "present",
        "components": 1, "merged_into": "", "merged_from": "", "group": "",
        "phase": "untreated", "in_fit": True, "fit_exclusion": ""})


def _naive_model(t, log_v0, k, beta):
    u = 1.0 - beta
    if abs(u) < 1e-9:
        return log_v0 + k * t
    return log_v0 + np.log(np.maximum(1.0 + u * k * t, 1e-12)) / u


def curve_fit_loop(phased: pd.DataFrame) -> pd.DataFrame:
    """The obvious script: one curve_fit per lesion, beta bounded to [-1, 3]."""
    rows = []
    for (subject, lesion), one in phased.groupby(["subject", "lesion"], sort=False):
        t = one["day"].to_numpy(float) - one["day"].min()
        y = np.log(one["volume_mm3"].to_numpy(float))
        slope, intercept = np.polyfit(t, y, 1)
        try:
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                p, _ = optimize.curve_fit(_naive_model, t, y, p0=[intercept, slope, 1.0],
                                          bounds=([-np.inf, -np.inf, -1.0], [np.inf, np.inf, 3.0]))
            rss = float(np.sum((y - _naive_model(t, *p)) ** 2))
        except RuntimeError:
            p, rss = [np.nan] * 3, np.nan
        rows.append({"subject": subject, "lesion": lesion, "beta": p[2], "rss_log": rss})
    return pd.DataFrame(rows)


def tool_rss(fits: pd.DataFrame, phased: pd.DataFrame) -> pd.DataFrame:
    """RSS of the tool's power-law parameters, recomputed here from fits.tsv columns."""
    power = fits[fits["model"] == "power"][["subject", "lesion", "v0_mm3", "k_per_day", "beta",
                                            "day_start"]]
    data = phased.merge(power, on=["subject", "lesion"])
    u = 1.0 - data["beta"].to_numpy(float)
    x = data["k_per_day"].to_numpy(float) * (data["day"] - data["day_start"]).to_numpy(float)
    with np.errstate(invalid="ignore", divide="ignore"):
        g = np.where(np.abs(u) < 1e-12, x, np.log1p(u * x) / np.where(u == 0, 1.0, u))
    resid = np.log(data["volume_mm3"] / data["v0_mm3"]).to_numpy(float) - g
    data = data.assign(r2=resid ** 2)
    rss = data.groupby(["subject", "lesion"], as_index=False)["r2"].sum()
    return power.merge(rss.rename(columns={"r2": "rss_log"}), on=["subject", "lesion"])


def compare(tool: pd.DataFrame, naive: pd.DataFrame) -> tuple[str, bool]:
    """Text and verdict: agree = curve_fit never finds a lower RSS, and >= 99 % of the lesions
    at the same optimum have |delta beta| <= BETA_TOL (the rest sit on flat profiles)."""
    both = tool.merge(naive, on=["subject", "lesion"], suffixes=("_tool", "_cf"))
    both = both[np.isfinite(both["rss_log_cf"]) & np.isfinite(both["rss_log_tool"])]
    diff = both["rss_log_tool"] - both["rss_log_cf"]
    same = np.abs(diff) <= RSS_TOL * (1 + both["rss_log_cf"])
    delta = np.abs(both["beta_tool"] - both["beta_cf"])[same]
    agree = int((delta <= BETA_TOL).sum())
    lower_tool = int((diff < 0)[~same].sum())
    lower_cf = int((~same).sum()) - lower_tool
    text = (f"{len(both)} lesions compared; {int(same.sum())} at the same optimum, of which "
            f"{agree} have |delta beta| <= {BETA_TOL:g} (max {delta.max():.2e}); elsewhere the "
            f"tool's RSS is lower for {lower_tool}, curve_fit's for {lower_cf}")
    return text, lower_cf == 0 and agree >= 0.99 * int(same.sum())


def nested_group_beta(phased: pd.DataFrame, near: float) -> float:
    """Shared beta by brute force: per-lesion curve_fit at fixed beta, summed, minimised."""
    series = [(one["day"].to_numpy(float) - one["day"].min(),
               np.log(one["volume_mm3"].to_numpy(float)))
              for _, one in phased.groupby(["subject", "lesion"], sort=False)]

    def rss_at(beta):
        total = 0.0
        for t, y in series:
            slope, intercept = np.polyfit(t, y, 1)
            with warnings.catch_warnings():
                warnings.simplefilter("ignore")
                p, _ = optimize.curve_fit(lambda t, a, k: _naive_model(t, a, k, beta), t, y,
                                          p0=[intercept, slope], maxfev=20000)
            total += float(np.sum((y - _naive_model(t, *p, beta)) ** 2))
        return total
    return float(optimize.minimize_scalar(rss_at, bounds=(near - 0.5, near + 0.5), method="bounded",
                                          options={"xatol": 1e-6}).x)


def timed(function, repeats: int):
    times, result = [], None
    for _ in range(repeats):
        start = time.perf_counter()
        result = function()
        times.append(time.perf_counter() - start)
    return times, result


def show(name: str, times: list[float]) -> float:
    median = statistics.median(times)
    print(f"  {name:34s} median {median:8.3f} s  min-max {min(times):.3f}-{max(times):.3f} s "
          f"({len(times)} runs)")
    return median


@contextlib.contextmanager
def blas_threads(limit):
    if threadpool_limits is None or limit is None:
        yield
    else:
        with threadpool_limits(limits=limit, user_api="blas"):
            yield


@contextlib.contextmanager
def unpinned_group_fit():
    """Turn off fit_groups' own BLAS pinning (benchmark only), to measure what it buys."""
    original = groupfit._one_blas_thread
    groupfit._one_blas_thread = contextlib.nullcontext
    try:
        yield
    finally:
        groupfit._one_blas_thread = original


@contextlib.contextmanager
def one_core_busy():
    """A second process spinning on one core, as when other jobs share the machine."""
    spinner = subprocess.Popen([sys.executable, "-c", "while True: pass"])
    try:
        time.sleep(0.3)
        yield
    finally:
        spinner.kill()
        spinner.wait()


def blas_effect(phased: pd.DataFrame, repeats: int) -> dict[str, float]:
    print("\ngroup fit, BLAS pinned to 1 thread (the tool's default) vs left at its default:")
    out = {}
    for busy in (False, True):
        with one_core_busy() if busy else contextlib.nullcontext():
            label = " with one core busy" if busy else ""
            out[f"pinned{label}"] = show(f"pinned{label}", timed(
                lambda: groupfit.fit_groups(phased), repeats)[0])
            with unpinned_group_fit():
                out[f"default{label}"] = show(f"default threads{label}", timed(
                    lambda: groupfit.fit_groups(phased), repeats)[0])
    return out


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--lesions", type=int, default=2000)
    parser.add_argument("--sessions", type=int, default=5)
    parser.add_argument("--repeats", type=int, default=5)
    parser.add_argument("--curve-fit-repeats", type=int, default=1)
    parser.add_argument("--seed", type=int, default=0)
    args = parser.parse_args()
    print(f"cores: {os.cpu_count()}; numpy {np.__version__}; scipy "
          f"{sys.modules['scipy'].__version__}; pandas {pd.__version__}")
    if threadpool_info is not None:
        blas = [f"{i['internal_api']} {i.get('version')} ({i['num_threads']} threads)"
                for i in threadpool_info() if i["user_api"] == "blas"]
        print(f"BLAS: {', '.join(blas)}")
    else:
        print("threadpoolctl missing: BLAS threads cannot be pinned or compared")
    phased = simulate(args.lesions, args.sessions, seed=args.seed)
    n = args.lesions
    print(f"\n{n} lesions x {args.sessions} sessions, beta 0.8, log-volume noise 0.1")
    per_lesion = float("nan")
    if fit_lesions is not None:
        with blas_threads(1):
            times, fits = timed(lambda: fit_lesions(phased), args.repeats)
        models = ",".join(FitSettings().models)
        print(f"  laws: {models}")
        per_lesion = show("per-lesion, all laws, BLAS 1 thread", times)
        with blas_threads(None):
            show("per-lesion, BLAS default threads", timed(lambda: fit_lesions(phased),
                                                           args.repeats)[0])
    else:
        print(f"  per-lesion: {MISSING}")
    times, naive = timed(lambda: curve_fit_loop(phased), args.curve_fit_repeats)
    loop = show("curve_fit loop, power law only", times)
    times, group = timed(lambda: groupfit.fit_groups(phased), args.repeats)
    group_time = show(f"group fit, {n} lesions", times)
    row = group.iloc[0]
    print(f"  group beta {row.beta:.4f} [{row.beta_ci_low:.4f}, {row.beta_ci_high:.4f}] "
          f"(true 0.8), status {row.status}")
    print("\nagreement:")
    verdicts = []
    if fit_lesions is not None:
        text, ok = compare(tool_rss(fits, phased), naive)
        print("  per-lesion vs curve_fit: " + text)
        verdicts.append(("per-lesion", ok))
    subset = phased[phased["subject"].isin(phased["subject"].unique()[:50])]
    mine = float(groupfit.fit_groups(subset).beta.iloc[0])
    nested = nested_group_beta(subset, mine)
    ok = abs(mine - nested) <= GROUP_TOL
    print(f"  group (100 lesions) {mine:.6f} vs nested curve_fit profile {nested:.6f}: "
          f"|delta| {abs(mine - nested):.1e} ({'within' if ok else 'OUTSIDE'} {GROUP_TOL:g})")
    verdicts.append(("group", ok))
    blas = blas_effect(phased, args.repeats) if threadpool_limits is not None else {}
    pinned_note = (f"; group with one core busy: pinned {blas['pinned with one core busy']:.2f} s "
                   f"vs default BLAS threads {blas['default with one core busy']:.2f} s"
                   if blas else "")
    per_lesion_text = (f"per-lesion {n}x{args.sessions} all laws {per_lesion:.2f} s (target < 2 s)"
                       if fit_lesions is not None else "per-lesion not available")
    agreement = ", ".join(f"{name} {'agrees' if ok else 'DISAGREES'}" for name, ok in verdicts)
    print(f"fit: {per_lesion_text}; group {n} lesions {group_time:.3f} s (target < 0.2 s); "
          f"curve_fit loop {loop:.1f} s{pinned_note}; betas vs curve_fit: {agreement}")


if __name__ == "__main__":
    main()
