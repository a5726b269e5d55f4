"""How well a fitted figure (beta by default) separates two outcomes of lesions.

For each figure (a numeric ``fits.tsv`` column) and phase, the lesions that have both an outcome
and a fitted value are split into positives and negatives, and the table reports the ROC AUC with
a confidence interval from a bootstrap that resamples subjects (lesions of one patient are not
independent), the DeLong standard error, the two-sided Mann-Whitney test and the threshold that
maximises Youden's index. ``threshold_table`` lists every threshold.

Research use only: see ``pipeline.DISCLAIMER``. A marker's AUC on a research cohort is not
evidence for clinical use; decisions rest with licensed clinicians under local rules.

References
----------
AUC = U / (n1 n0) with mid-ranks: Bamber D. J Math Psychol 1975;12:387-415; Hanley JA, McNeil BJ.
Radiology 1982;143:29-36.
DeLong ER, DeLong DM, Clarke-Pearson DL. Biometrics 1988;44:837-845 (structural components);
mid-rank computation: Sun X, Xu W. IEEE Signal Process Lett 2014;21:1389-1393.
Cluster (subject) bootstrap: Obuchowski NA. Biometrics 1997;53:567-578; Efron B, Tibshirani R.
An Introduction to the Bootstrap, 1993 (percentile interval).
Youden WJ. Index for rating diagnostic tests. Cancer 1950;3:32-35.
"""
from __future__ import annotations

from collections.abc import Iterator, Sequence

import numpy as np
import pandas as pd
from scipy import stats

from pipeline.errors import UsageError

#: Descriptions and units of the ``evaluation.tsv`` columns (BIDS sidecar style).
COLUMNS: dict[str, dict] = {
    "figure": {"Description": "fits.tsv column evaluated as a marker (e.g. beta)"},
    "phase": {"Description": "Phase of the fits used"},
    "model": {"Description": "Fits of this growth law were used ('best' = each lesion's best "
                             "law)"},
    "positive": {"Description": "Outcome value counted as positive (compared in lower case; "
                                "numbers as integers where whole)"},
    "direction": {"Description": "Which side of the figure indicates the positive outcome",
                  "Levels": {"higher": "higher values indicate the positive outcome",
                             "lower": "lower values indicate the positive outcome"}},
    "n_positive": {"Description": "Lesions with the positive outcome and a fitted value",
                   "Units": "lesions"},
    "n_negative": {"Description": "Lesions with the other outcome and a fitted value",
                   "Units": "lesions"},
    "n_subjects": {"Description": "Subjects contributing lesions", "Units": "subjects"},
    "n_left_out": {"Description": "Lesions with an outcome but no fit row or no value of the "
                                  "figure in this phase", "Units": "lesions"},
    "auc": {"Description": "ROC area under the curve: P(positive beyond negative) + 0.5 P(tie), "
                           "in the stated direction", "Units": "1"},
    "auc_ci_low": {"Description": "Lower end of the percentile bootstrap interval of the AUC; "
                                  "resamples subjects with all their lesions", "Units": "1"},
    "auc_ci_high": {"Description": "Upper end of the subject bootstrap interval of the AUC",
                    "Units": "1"},
    "confidence": {"Description": "Level of the AUC interval", "Units": "1"},
    "n_boot": {"Description": "Bootstrap resamples drawn", "Units": "resamples"},
    "n_boot_used": {"Description": "Resamples that held both outcomes (the others have no AUC)",
                    "Units": "resamples"},
    "delong_se": {"Description": "DeLong standard error of the AUC (treats lesions as "
                                 "independent)", "Units": "1"},
    "mannwhitney_u": {"Description": "Mann-Whitney U of the positive lesions in the stated "
                                     "direction (= auc * n_positive * n_negative)", "Units": "1"},
    "p_value": {"Description": "Two-sided Mann-Whitney p-value (scipy.stats.mannwhitneyu; "
                               "treats lesions as independent)", "Units": "1"},
    "youden_threshold": {"Description": "Threshold maximising Youden's index; positive when the "
                                        "figure is >= it (direction higher) or <= it (lower); "
                                        "ties go to the higher specificity",
                         "Units": "units of the figure"},
    "sensitivity": {"Description": "Sensitivity at the Youden threshold", "Units": "1"},
    "specificity": {"Description": "Specificity at the Youden threshold", "Units": "1"},
    "youden_index": {"Description": "Youden's J = sensitivity + specificity - 1", "Units": "1"},
    "status": {"Description": "Outcome of the evaluation",
               "Levels": {"ok": "evaluated",
                          "one-class": "positives or negatives missing: nothing to compare"}},
    "note": {"Description": "What was left out and what to read with care"},
}

#: Columns of ``threshold_table`` (evaluation_thresholds.tsv).
THRESHOLD_COLUMNS: dict[str, dict] = {
    "figure": COLUMNS["figure"], "phase": COLUMNS["phase"], "model": COLUMNS["model"],
    "direction": COLUMNS["direction"],
    "threshold": {"Description": "Lesions at or beyond this value (in the stated direction) "
                                 "are called positive", "Units": "units of the figure"},
    "true_positive": {"Description": "Positive lesions called positive", "Units": "lesions"},
    "false_positive": {"Description": "Negative lesions called positive", "Units": "lesions"},
    "sensitivity": {"Description": "true_positive / n_positive", "Units": "1"},
    "specificity": {"Description": "1 - false_positive / n_negative", "Units": "1"},
    "youden_index": {"Description": "sensitivity + specificity - 1", "Units": "1"},
}

_NATURAL_POSITIVE = ({"0", "1"}, "1"), ({"false", "true"}, "true"), ({"no", "yes"}, "yes")
_SUMMARY = tuple(COLUMNS)


# ---------------------------------------------------------------- statistics on arrays
def auc_components(x_pos: np.ndarray, x_neg: np.ndarray) -> tuple[float, np.ndarray, np.ndarray]:
    """AUC and DeLong's structural components from mid-ranks.

    ``V10[i]`` = mean over negatives of psi(x_pos[i], x_neg[j]), ``V01[j]`` = mean over positives,
    psi(a, b) = 1 if a > b, 0.5 if a == b, else 0.

    Examples
    --------
    >>> auc, v10, v01 = auc_components(np.array([3.0, 2.0]), np.array([1.0, 2.0]))
    >>> float(auc), v10.tolist(), v01.tolist()
    (0.875, [1.0, 0.75], [1.0, 0.75])
    """
    n1, n0 = len(x_pos), len(x_neg)
    both = stats.rankdata(np.concatenate([x_pos, x_neg]))
    within_pos, within_neg = stats.rankdata(x_pos), stats.rankdata(x_neg)
    v10 = (both[:n1] - within_pos) / n0
    v01 = 1.0 - (both[n1:] - within_neg) / n1
    return float(v10.mean()), v10, v01


def delong_se(v10: np.ndarray, v01: np.ndarray) -> float:
    """DeLong standard error: sqrt(s^2(V10) / n1 + s^2(V01) / n0), sample variances (ddof 1)."""
    if len(v10) < 2 or len(v01) < 2:
        return float("nan")
    return float(np.sqrt(np.var(v10, ddof=1) / len(v10) + np.var(v01, ddof=1) / len(v01)))


def subject_weights(codes: np.ndarray, n_boot: int, rng: np.random.Generator) -> np.ndarray:
    """Bootstrap weights (n_boot x lesions): subjects drawn with replacement, every lesion of a
    drawn subject counted as often as its subject was drawn."""
    n_subjects = int(codes.max()) + 1
    draws = rng.integers(0, n_subjects, size=(n_boot, n_subjects))
    flat = (draws + n_subjects * np.arange(n_boot)[:, None]).ravel()
    counts = np.bincount(flat, minlength=n_boot * n_subjects).reshape(n_boot, n_subjects)
    return counts[:, codes].astype(float)


def weighted_auc(x: np.ndarray, positive: np.ndarray, weights: np.ndarray) -> np.ndarray:
    """AUC of every row of ``weights`` (resamples x lesions); NaN where a class has no weight."""
    x_pos, x_neg = x[positive], x[~positive]
    order = np.argsort(x_neg, kind="stable")
    neg_sorted = x_neg[order]
    below = np.searchsorted(neg_sorted, x_pos, side="left")
    up_to = np.searchsorted(neg_sorted, x_pos, side="right")
    w_pos, w_neg = weights[:, positive], weights[:, ~positive][:, order]
    cumulative = np.concatenate([np.zeros((len(weights), 1)), np.cumsum(w_neg, axis=1)], axis=1)
    credit = cumulative[:, below] + 0.5 * (cumulative[:, up_to] - cumulative[:, below])
    denominator = w_pos.sum(axis=1) * w_neg.sum(axis=1)
    with np.errstate(invalid="ignore", divide="ignore"):
        return np.where(denominator > 0, (w_pos * credit).sum(axis=1) / denominator, np.nan)


def _bootstrap(x: np.ndarray, positive: np.ndarray, codes: np.ndarray, n_boot: int,
               seed: int) -> np.ndarray:
    """Subject-bootstrap AUCs, computed in chunks so memory stays bounded."""
    rng = np.random.default_rng(seed)
    chunk = max(1, int(4e6 // max(len(x), 1)))
    out = [weighted_auc(x, positive, subject_weights(codes, min(chunk, n_boot - start), rng))
           for start in range(0, n_boot, chunk)]
    return np.concatenate(out) if out else np.empty(0)


def roc_thresholds(x: np.ndarray, positive: np.ndarray) -> pd.DataFrame:
    """Sensitivity and specificity of the rule 'positive when x >= threshold' at every value.

    Examples
    --------
    >>> roc_thresholds(np.array([1.0, 2.0, 3.0]), np.array([False, True, True])).values.tolist()
    [[1.0, 2.0, 1.0, 1.0, 0.0, 0.0], [2.0, 2.0, 0.0, 1.0, 1.0, 1.0], [3.0, 1.0, 0.0, 0.5, 1.0, 0.5]]
    """
    values = np.unique(x)
    pos_sorted, neg_sorted = np.sort(x[positive]), np.sort(x[~positive])
    tp = len(pos_sorted) - np.searchsorted(pos_sorted, values, side="left")
    fp = len(neg_sorted) - np.searchsorted(neg_sorted, values, side="left")
    sensitivity = tp / max(len(pos_sorted), 1)
    specificity = 1.0 - fp / max(len(neg_sorted), 1)
    return pd.DataFrame({"threshold": values, "true_positive": tp, "false_positive": fp,
                         "sensitivity": sensitivity, "specificity": specificity,
                         "youden_index": sensitivity + specificity - 1.0})


def youden_point(table: pd.DataFrame) -> pd.Series:
    """The row of ``roc_thresholds`` with the largest Youden index (ties: higher specificity)."""
    best = table.sort_values(["youden_index", "specificity"], ascending=False, kind="stable")
    return best.iloc[0]


# ---------------------------------------------------------------- tables in
def _norm(value: object) -> str:
    """Outcome value as comparable text: True -> 'true', 1.0 -> '1', ' Yes ' -> 'yes'."""
    if isinstance(value, (bool, np.bool_)):
        return "true" if value else "false"
    if isinstance(value, (int, float, np.integer, np.floating)):
        return str(int(value)) if float(value).is_integer() else repr(float(value))
    return str(value).strip().lower()


def _missing(value: object) -> bool:
    return value is None or (isinstance(value, float) and np.isnan(value)) \
        or (isinstance(value, str) and value.strip().lower() in ("", "n/a", "nan"))


def _lesion_ids(column: pd.Series, table: str) -> pd.Series:
    numbers = pd.to_numeric(column, errors="coerce")
    bad = numbers.isna() | (numbers != numbers.round())
    if bad.any():
        raise UsageError(f"{table}: lesion must be a whole number; got {column[bad].iloc[0]!r}")
    return numbers.astype("int64")


def unknown_subjects(outcomes: pd.DataFrame, known: set[str], *, name: str = "outcomes"
                     ) -> tuple[pd.DataFrame, list[dict]]:
    """Outcome rows whose subject is not in the run, split off as ``errors.tsv`` rows.

    Returns the outcome rows of known subjects and one error row per refused row (its table row
    number counts the header as row 1).

    >>> rows = pd.DataFrame({"subject": ["a", "zz"], "lesion": [1, 1], "outcome": [0, 1]})
    >>> kept, errors = unknown_subjects(rows, {"a"})
    >>> len(kept), errors[0]["reason"]
    (1, "outcomes row 3: subject 'zz' is not in the run; row ignored")
    """
    if "subject" not in outcomes.columns:
        return outcomes, []
    unknown = ~outcomes["subject"].astype(str).isin(known)
    errors = [{"subject": str(subject), "session": "", "path": name, "stage": "evaluate",
               "reason": f"{name} row {i + 2}: subject {str(subject)!r} is not in the run; "
                         "row ignored"}
              for i, subject in zip(np.flatnonzero(unknown.to_numpy()),
                                    outcomes.loc[unknown, "subject"])]
    return outcomes[~unknown.to_numpy()], errors


def _labelled(outcomes: pd.DataFrame, positive: object) -> tuple[pd.DataFrame, str, int]:
    """(subject, lesion, is_positive) rows, the positive value's name, rows without outcome."""
    missing = [c for c in ("subject", "lesion", "outcome") if c not in outcomes.columns]
    if missing:
        raise UsageError(f"outcomes table lacks columns {missing}; expected subject, lesion, "
                         "outcome")
    known = ~outcomes["outcome"].map(_missing).astype(bool)
    table = pd.DataFrame({"subject": outcomes.loc[known, "subject"].astype(str),
                          "lesion": _lesion_ids(outcomes.loc[known, "lesion"], "outcomes"),
                          "value": outcomes.loc[known, "outcome"].map(_norm)})
    dup = table.duplicated(["subject", "lesion"], keep=False)
    if dup.any():
        first = table[dup].iloc[0]
        raise UsageError(f"outcomes table lists subject {first.subject} lesion {first.lesion} "
                         "more than once; give one outcome per lesion")
    values = sorted(table["value"].unique())
    if len(values) != 2:
        raise UsageError(f"outcome must have exactly two distinct values; got {len(values)}: "
                         f"{values[:10]}")
    chosen = _positive_value(values, positive)
    return (table.assign(positive=table["value"] == chosen)[["subject", "lesion", "positive"]],
            chosen, int((~known).sum()))


def _positive_value(values: list[str], positive: object) -> str:
    if positive is not None:
        wanted = _norm(positive)
        if wanted not in values:
            raise UsageError(f"positive outcome {positive!r} is not one of the outcome values "
                             f"{values}")
        return wanted
    for pair, natural in _NATURAL_POSITIVE:
        if set(values) == pair:
            return natural
    raise UsageError(f"outcome values are {values}: say which one is positive (the 'positive' "
                     "argument, --positive on the command line)")


def _selected_fits(fits: pd.DataFrame, model: str, phase: str | None) -> pd.DataFrame:
    for name in ("subject", "lesion", "phase", "model"):
        if name not in fits.columns:
            raise UsageError(f"fits table lacks column {name!r}")
    if model == "best":
        if "best" not in fits.columns:
            raise UsageError("fits table has no 'best' column; choose a model instead of 'best'")
        keep = fits["best"].map(lambda v: _norm(v) in ("true", "1")).astype(bool)
    else:
        keep = fits["model"].astype(str) == model
        if not keep.any():
            raise UsageError(f"no fits of model {model!r}; models present: "
                             f"{sorted(fits['model'].astype(str).unique())}")
    chosen = fits[keep]
    if phase is not None:
        chosen = chosen[chosen["phase"].astype(str) == phase]
        if chosen.empty:
            raise UsageError(f"no {model} fits in phase {phase!r}; phases present: "
                             f"{sorted(fits['phase'].astype(str).unique())}")
    chosen = chosen.assign(subject=chosen["subject"].astype(str),
                           lesion=_lesion_ids(chosen["lesion"], "fits"),
                           phase=chosen["phase"].astype(str))
    if chosen.duplicated(["subject", "lesion", "phase"]).any():
        raise UsageError(f"fits table has several {model} rows for one lesion and phase")
    return chosen


def _figure_values(fits: pd.DataFrame, figure: str) -> pd.Series:
    if figure not in fits.columns:
        numeric = [c for c in fits.columns if pd.api.types.is_numeric_dtype(fits[c])]
        raise UsageError(f"fits table has no column {figure!r}; numeric columns: {numeric}")
    return pd.to_numeric(fits[figure], errors="coerce")


def _pairs(fits: pd.DataFrame, labelled: pd.DataFrame,
           figure: str) -> Iterator[tuple[str, pd.DataFrame, int, int]]:
    """Per phase: lesions with an outcome and a finite figure, left-out and unlabelled counts."""
    values = fits.assign(x=_figure_values(fits, figure))
    for phase, part in values.groupby("phase", sort=True):
        joined = labelled.merge(part[["subject", "lesion", "x"]], on=["subject", "lesion"],
                                how="left")
        usable = np.isfinite(joined["x"].to_numpy(float))
        unlabelled = len(part) - int(part.set_index(["subject", "lesion"]).index.isin(
            labelled.set_index(["subject", "lesion"]).index).sum())
        yield str(phase), joined[usable], int((~usable).sum()), unlabelled


# ---------------------------------------------------------------- public functions
def _check_options(figures: Sequence[str], direction: str) -> tuple[str, ...]:
    if direction not in ("higher", "lower", "auto"):
        raise UsageError(f"direction must be 'higher', 'lower' or 'auto'; got {direction!r}")
    return (figures,) if isinstance(figures, str) else tuple(figures)


def _oriented(data: pd.DataFrame, direction: str) -> tuple[np.ndarray, np.ndarray, str]:
    """Figure values turned so that larger means 'more positive', and the direction used."""
    x, positive = data["x"].to_numpy(float), data["positive"].to_numpy(bool)
    if direction == "auto":
        direction = "higher" if auc_components(x[positive], x[~positive])[0] >= 0.5 else "lower"
    return (x if direction == "higher" else -x), positive, direction


def evaluate_marker(fits: pd.DataFrame, outcomes: pd.DataFrame, *,
                    figures: Sequence[str] = ("beta",), phase: str | None = None,
                    model: str = "power", positive: object = None, n_boot: int = 2000,
                    seed: int = 0, confidence: float = 0.95,
                    direction: str = "higher") -> pd.DataFrame:
    """ROC AUC, Mann-Whitney test and Youden threshold of fitted figures for a binary outcome.

    Parameters
    ----------
    fits : pandas.DataFrame
        ``fits.tsv`` rows: ``subject``, ``lesion``, ``phase``, ``model`` (``best`` for
        ``model='best'``) and the figure columns.
    outcomes : pandas.DataFrame
        ``subject``, ``lesion``, ``outcome`` with exactly two distinct values (missing ones are
        left out and counted in ``note``).
    figures : sequence of str
        Numeric fits columns to evaluate.
    phase : str, optional
        Only fits of this phase; by default every phase is evaluated separately.
    model : str
        Fits of this law, or ``'best'`` for each lesion's best row.
    positive : optional
        Outcome value counted as positive; by default 1 of {0, 1}, true of {false, true}, yes of
        {no, yes}, otherwise an error asks for it.
    n_boot, seed, confidence
        Subject-bootstrap resamples, random seed and interval level for the AUC.
    direction : {'higher', 'lower', 'auto'}
        Which side of the figure is expected for positives ('auto' picks the side with AUC >= 0.5
        from the data, which flatters the AUC; it is noted).

    Returns
    -------
    pandas.DataFrame
        One row per (figure, phase); columns as in ``COLUMNS``.

    Examples
    --------
    >>> fits = pd.DataFrame({"subject": list("abcdef"), "lesion": 1, "phase": "untreated",
    ...                      "model": "power", "beta": [1.4, 1.2, 1.1, 0.9, 0.8, 1.15]})
    >>> outcomes = pd.DataFrame({"subject": list("abcdef"), "lesion": 1,
    ...                          "outcome": ["yes", "yes", "no", "no", "no", "yes"]})
    >>> row = evaluate_marker(fits, outcomes, n_boot=200).iloc[0]
    >>> [float(row[c]) for c in ("auc", "n_positive", "youden_threshold", "youden_index")]
    [1.0, 3.0, 1.15, 1.0]
    """
    figures = _check_options(figures, direction)
    if n_boot < 0 or not 0.0 < confidence < 1.0:
        raise UsageError(f"need n_boot >= 0 and 0 < confidence < 1; got {n_boot}, {confidence}")
    labelled, chosen, no_outcome = _labelled(outcomes, positive)
    selected = _selected_fits(fits, model, phase)
    rows = []
    for figure in figures:
        for name, data, left_out, unlabelled in _pairs(selected, labelled, figure):
            notes = _notes(left_out, unlabelled, no_outcome, direction)
            row = {"figure": figure, "phase": name, "model": model, "positive": chosen,
                   "n_left_out": left_out, "confidence": confidence, "n_boot": n_boot}
            rows.append({**row, **_summary(data, direction, n_boot, seed, confidence, notes)})
    return pd.DataFrame(rows, columns=list(_SUMMARY))


def _notes(left_out: int, unlabelled: int, no_outcome: int, direction: str) -> list[str]:
    notes = []
    if left_out:
        notes.append(f"{left_out} lesion(s) with an outcome but no fit or no value left out")
    if unlabelled:
        notes.append(f"{unlabelled} fitted lesion(s) without an outcome ignored")
    if no_outcome:
        notes.append(f"{no_outcome} outcome row(s) without a value left out")
    if direction == "auto":
        notes.append("direction chosen from the same data: the AUC is optimistic")
    return notes


def _summary(data: pd.DataFrame, direction: str, n_boot: int, seed: int, confidence: float,
             notes: list[str]) -> dict:
    """The statistics of one (figure, phase)."""
    positive = data["positive"].to_numpy(bool)
    n1, n0 = int(positive.sum()), int((~positive).sum())
    codes = pd.factorize(data["subject"])[0]
    out = {"n_positive": n1, "n_negative": n0, "n_subjects": int(codes.max() + 1) if len(codes)
           else 0, "n_boot_used": 0, "direction": direction}
    if n1 == 0 or n0 == 0:
        return {**out, "status": "one-class", "note": "; ".join(
            [*notes, "no positive lesions" if n1 == 0 else "no negative lesions"])}
    x, positive, used = _oriented(data, direction)
    auc, v10, v01 = auc_components(x[positive], x[~positive])
    test = stats.mannwhitneyu(x[positive], x[~positive], alternative="two-sided")
    best = youden_point(roc_thresholds(x, positive))
    boot = _bootstrap(x, positive, codes, n_boot, seed)
    valid = boot[np.isfinite(boot)]
    tail = (1.0 - confidence) / 2.0
    low, high = (np.quantile(valid, [tail, 1.0 - tail]) if len(valid) else (np.nan, np.nan))
    if out["n_subjects"] < 10:
        notes = [*notes, f"only {out['n_subjects']} subjects: the bootstrap interval is rough"]
    return {**out, "direction": used, "auc": auc, "auc_ci_low": float(low),
            "auc_ci_high": float(high), "n_boot_used": len(valid), "delong_se": delong_se(v10, v01),
            "mannwhitney_u": float(test.statistic), "p_value": float(test.pvalue),
            "youden_threshold": float(best.threshold) * (1 if used == "higher" else -1),
            "sensitivity": float(best.sensitivity), "specificity": float(best.specificity),
            "youden_index": float(best.youden_index), "status": "ok", "note": "; ".join(notes)}


def threshold_table(fits: pd.DataFrame, outcomes: pd.DataFrame, *,
                    figures: Sequence[str] = ("beta",), phase: str | None = None,
                    model: str = "power", positive: object = None,
                    direction: str = "higher") -> pd.DataFrame:
    """Sensitivity, specificity and Youden index at every observed value of each figure.

    Same selection arguments as ``evaluate_marker``; one row per (figure, phase, threshold).
    With direction 'higher' a lesion is called positive when its value is >= the threshold,
    with 'lower' when it is <= the threshold.

    Examples
    --------
    >>> fits = pd.DataFrame({"subject": list("abcd"), "lesion": 1, "phase": "untreated",
    ...                      "model": "power", "beta": [1.3, 1.1, 0.9, 1.2]})
    >>> outcomes = pd.DataFrame({"subject": list("abcd"), "lesion": 1, "outcome": [1, 0, 0, 1]})
    >>> threshold_table(fits, outcomes)[["threshold", "sensitivity", "specificity"]].values.tolist()
    [[0.9, 1.0, 0.0], [1.1, 1.0, 0.5], [1.2, 1.0, 1.0], [1.3, 0.5, 1.0]]
    """
    figures = _check_options(figures, direction)
    labelled, _, _ = _labelled(outcomes, positive)
    selected = _selected_fits(fits, model, phase)
    parts = []
    for figure in figures:
        for name, data, _, _ in _pairs(selected, labelled, figure):
            positive_mask = data["positive"].to_numpy(bool)
            if positive_mask.all() or not positive_mask.any():
                continue
            x, positive_mask, used = _oriented(data, direction)
            table = roc_thresholds(x, positive_mask)
            table["threshold"] = table["threshold"] * (1 if used == "higher" else -1)
            table.insert(0, "direction", used)
            table.insert(0, "model", model)
            table.insert(0, "phase", name)
            table.insert(0, "figure", figure)
            parts.append(table.sort_values("threshold", kind="stable"))
    if not parts:
        return pd.DataFrame(columns=list(THRESHOLD_COLUMNS))
    return pd.concat(parts, ignore_index=True)[list(THRESHOLD_COLUMNS)]
