"""Marker evaluation: ROC AUC, DeLong SE, subject bootstrap, Youden (pipeline.growth.evaluate)."""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
from scipy import stats

from pipeline.errors import UsageError
from pipeline.growth.evaluate import (COLUMNS, THRESHOLD_COLUMNS, auc_components, evaluate_marker,
                                      subject_weights, threshold_table, weighted_auc)

sklearn_metrics = pytest.importorskip("sklearn.metrics")  # test-only reference library

# Reference: docs/methods.md, check value C24 (values computed there with scipy and scikit-learn).
C24_POS, C24_NEG = [0.9, 0.8, 0.7, 0.55], [0.6, 0.4, 0.3, 0.2, 0.1]
C24_TIES_POS, C24_TIES_NEG = [1.0, 2.0, 2.0, 3.0], [0.0, 2.0, 2.0, 1.0]


def _tables(x_pos, x_neg, *, subjects=None, figure="beta", outcome=("1", "0")):
    """One lesion per value; by default every lesion is its own subject."""
    x = list(x_pos) + list(x_neg)
    n = len(x)
    subjects = subjects if subjects is not None else [f"s{i:03d}" for i in range(n)]
    lesions = pd.Series(subjects).groupby(subjects).cumcount().to_numpy() + 1
    fits = pd.DataFrame({"subject": subjects, "lesion": lesions, "phase": "untreated",
                         "model": "power", figure: x})
    outcomes = pd.DataFrame({"subject": subjects, "lesion": lesions,
                             "outcome": [outcome[0]] * len(x_pos) + [outcome[1]] * len(x_neg)})
    return fits, outcomes


def _delong_by_pairs(x_pos, x_neg):
    # Reference: DeLong et al. Biometrics 1988 structural components, computed directly from the
    # pairwise kernel psi(x, y) = 1[x > y] + 0.5 1[x == y] (docs/methods.md §6).
    xp, xn = np.asarray(x_pos)[:, None], np.asarray(x_neg)[None, :]
    psi = (xp > xn) + 0.5 * (xp == xn)
    v10, v01 = psi.mean(axis=1), psi.mean(axis=0)
    return np.sqrt(v10.var(ddof=1) / len(v10) + v01.var(ddof=1) / len(v01))


@pytest.mark.parametrize("x_pos, x_neg, auc, u, se", [
    (C24_POS, C24_NEG, 0.95, 19.0, 0.0707107),
    (C24_TIES_POS, C24_TIES_NEG, 0.71875, 11.5, 0.182217),
])
def test_c24_auc_u_and_delong(x_pos, x_neg, auc, u, se):
    row = evaluate_marker(*_tables(x_pos, x_neg), n_boot=100).iloc[0]
    # Reference: scipy.stats.mannwhitneyu U of the first sample; AUC = U / (n1 n0).
    scipy_u = stats.mannwhitneyu(x_pos, x_neg).statistic
    assert row.mannwhitney_u == pytest.approx(scipy_u) == pytest.approx(u)
    assert row.auc == pytest.approx(scipy_u / (len(x_pos) * len(x_neg)))
    # Reference: sklearn.metrics.roc_auc_score (ties counted one half).
    y = [1] * len(x_pos) + [0] * len(x_neg)
    assert row.auc == pytest.approx(sklearn_metrics.roc_auc_score(y, list(x_pos) + list(x_neg)))
    assert row.auc == pytest.approx(auc)
    # Reference: structural-components formula computed independently above; docs/methods.md, check
    # value C24.
    assert row.delong_se == pytest.approx(_delong_by_pairs(x_pos, x_neg), rel=1e-12)
    assert row.delong_se == pytest.approx(se, abs=1e-6)


@pytest.mark.parametrize("decimals", [None, 1])
def test_auc_matches_scipy_and_sklearn_on_random_data(decimals):
    # Reference: scipy.stats.mannwhitneyu and sklearn.metrics.roc_auc_score; rounding makes ties.
    rng = np.random.default_rng(17)
    x_pos, x_neg = rng.normal(1.2, 0.3, 37), rng.normal(1.0, 0.3, 53)
    if decimals is not None:
        x_pos, x_neg = np.round(x_pos, decimals), np.round(x_neg, decimals)
    row = evaluate_marker(*_tables(x_pos, x_neg), n_boot=200).iloc[0]
    test = stats.mannwhitneyu(x_pos, x_neg, alternative="two-sided")
    y = np.r_[np.ones(37), np.zeros(53)]
    assert row.auc == pytest.approx(test.statistic / (37 * 53), rel=1e-12)
    assert row.auc == pytest.approx(sklearn_metrics.roc_auc_score(y, np.r_[x_pos, x_neg]))
    assert row.p_value == pytest.approx(test.pvalue)
    assert row.delong_se == pytest.approx(_delong_by_pairs(x_pos, x_neg), rel=1e-10)
    assert row.auc_ci_low < row.auc < row.auc_ci_high
    assert (row.n_positive, row.n_negative, row.n_subjects) == (37, 53, 90)


def test_youden_index_definition():
    # Reference: Youden WJ. Cancer 1950 - J = sensitivity + specificity - 1, maximised over
    # thresholds; cross-checked with sklearn.metrics.roc_curve (max of tpr - fpr).
    rng = np.random.default_rng(3)
    x_pos, x_neg = np.round(rng.normal(1.3, 0.4, 25), 2), np.round(rng.normal(1.0, 0.4, 30), 2)
    fits, outcomes = _tables(x_pos, x_neg)
    row = evaluate_marker(fits, outcomes, n_boot=50).iloc[0]
    table = threshold_table(fits, outcomes)
    for t in table.itertuples():
        sens = np.mean(x_pos >= t.threshold)
        spec = np.mean(x_neg < t.threshold)
        assert (t.sensitivity, t.specificity) == pytest.approx((sens, spec))
        assert t.youden_index == pytest.approx(sens + spec - 1)
    assert row.youden_index == pytest.approx(table.youden_index.max())
    assert row.youden_index == pytest.approx(row.sensitivity + row.specificity - 1)
    fpr, tpr, _ = sklearn_metrics.roc_curve(np.r_[np.ones(25), np.zeros(30)], np.r_[x_pos, x_neg])
    assert row.youden_index == pytest.approx(np.max(tpr - fpr))
    assert np.mean(x_pos >= row.youden_threshold) == pytest.approx(row.sensitivity)
    assert list(table.columns) == list(THRESHOLD_COLUMNS)


def test_subject_weights_move_all_lesions_of_a_subject_together():
    # Reference: cluster bootstrap (Obuchowski 1997): subjects are drawn, lesions follow.
    codes = np.array([0, 0, 0, 1, 2, 2, 3])
    weights = subject_weights(codes, 500, np.random.default_rng(0))
    assert weights.shape == (500, 7)
    for subject in range(4):
        columns = weights[:, codes == subject]
        assert (columns == columns[:, :1]).all()
    per_subject = weights[:, [0, 3, 4, 6]]
    assert (per_subject.sum(axis=1) == 4).all()  # 4 draws of subjects per resample
    assert per_subject.std() > 0


def test_weighted_auc_equals_auc_of_replicated_lesions():
    # Reference: sklearn.metrics.roc_auc_score on the data with each lesion repeated w times.
    rng = np.random.default_rng(2)
    x = np.round(rng.normal(size=20), 1)
    positive = rng.random(20) < 0.4
    weights = rng.integers(0, 4, size=(5, 20)).astype(float)
    got = weighted_auc(x, positive, weights)
    for row, w in zip(got, weights.astype(int)):
        y, score = np.repeat(positive, w), np.repeat(x, w)
        expected = sklearn_metrics.roc_auc_score(y, score) if 0 < y.sum() < len(y) else np.nan
        assert row == pytest.approx(expected, nan_ok=True)
    assert weighted_auc(x, positive, np.ones((1, 20)))[0] == pytest.approx(
        auc_components(x[positive], x[~positive])[0])


def test_bootstrap_resamples_subjects_not_lesions():
    # Each subject's lesions are identical copies: resampling subjects must give exactly the
    # interval of one lesion per subject (same seed, same subject draws), while treating the
    # copies as independent lesions would narrow it.
    rng = np.random.default_rng(4)
    x_pos, x_neg = rng.normal(1.2, 0.3, 12), rng.normal(1.0, 0.3, 14)
    single = evaluate_marker(*_tables(x_pos, x_neg), n_boot=400, seed=7).iloc[0]
    copies = 3
    subjects = [f"s{i:03d}" for i in range(26) for _ in range(copies)]
    fits, outcomes = _tables(np.repeat(x_pos, copies), np.repeat(x_neg, copies),
                             subjects=subjects)
    clustered = evaluate_marker(fits, outcomes, n_boot=400, seed=7).iloc[0]
    assert clustered.n_subjects == 26 and clustered.n_positive == 36
    assert clustered.auc == pytest.approx(single.auc)
    assert (clustered.auc_ci_low, clustered.auc_ci_high) == pytest.approx(
        (single.auc_ci_low, single.auc_ci_high))
    naive = evaluate_marker(*_tables(np.repeat(x_pos, copies), np.repeat(x_neg, copies)),
                            n_boot=400, seed=7).iloc[0]  # every copy its own subject
    assert naive.auc_ci_high - naive.auc_ci_low < 0.8 * (clustered.auc_ci_high
                                                         - clustered.auc_ci_low)


@pytest.mark.parametrize("high, low, expected, auc", [
    (1, 0, "1", 1.0), (False, True, "true", 0.0), ("yes", "no", "yes", 1.0),
    ("Yes", "No", "yes", 1.0), (1.0, 0.0, "1", 1.0), ("0", "1", "1", 0.0),
])
def test_natural_positive_values(high, low, expected, auc):
    # 'high' goes to the lesions with the larger figure: AUC 1 when it is the positive value.
    fits, outcomes = _tables([2.0, 3.0], [1.0, 0.5])
    outcomes["outcome"] = [high, high, low, low]
    row = evaluate_marker(fits, outcomes, n_boot=20).iloc[0]
    assert (row.positive, row.auc) == (expected, auc)


def test_positive_must_be_named_when_values_are_not_natural():
    fits, outcomes = _tables([2.0, 3.0], [1.0], outcome=("progressed", "stable"))
    with pytest.raises(UsageError, match="say which one is positive"):
        evaluate_marker(fits, outcomes)
    row = evaluate_marker(fits, outcomes, positive="stable", n_boot=20).iloc[0]
    assert (row.positive, row.n_positive, row.auc) == ("stable", 1, 0.0)
    with pytest.raises(UsageError, match="not one of the outcome values"):
        evaluate_marker(fits, outcomes, positive="dead")


def test_outcome_needs_exactly_two_values():
    fits, outcomes = _tables([2.0, 3.0], [1.0])
    outcomes["outcome"] = ["a", "b", "c"]
    with pytest.raises(UsageError, match="exactly two distinct values; got 3"):
        evaluate_marker(fits, outcomes)


def test_lesions_without_fit_or_value_are_left_out_and_counted():
    fits, outcomes = _tables([2.0, 3.0, 2.5], [1.0, 0.5, 1.5])
    fits.loc[0, "beta"] = np.nan
    fits = fits.drop(index=5)
    extra = pd.DataFrame({"subject": ["zz"], "lesion": [1], "phase": ["untreated"],
                          "model": ["power"], "beta": [9.0]})
    row = evaluate_marker(pd.concat([fits, extra]), outcomes, n_boot=20).iloc[0]
    assert (row.n_positive, row.n_negative, row.n_left_out) == (2, 2, 2)
    assert "2 lesion(s) with an outcome but no fit or no value left out" in row.note
    assert "1 fitted lesion(s) without an outcome ignored" in row.note


def test_model_phase_and_direction_selection():
    fits, outcomes = _tables([2.0, 3.0, 2.5], [1.0, 0.5, 1.5])
    other = fits.assign(model="exponential", beta=-fits.beta)
    later = fits.assign(phase="after-radiosurgery", beta=-fits.beta)
    best = other.assign(best=True)
    table = pd.concat([fits.assign(best=False), best, later.assign(best=False)])
    rows = evaluate_marker(table, outcomes, n_boot=20)
    assert rows.phase.tolist() == ["after-radiosurgery", "untreated"]
    assert rows.auc.tolist() == [0.0, 1.0]
    only = evaluate_marker(table, outcomes, phase="untreated", model="best", n_boot=20,
                           figures="beta")  # a single name is accepted as well as a tuple
    assert only.auc.tolist() == [0.0]
    lower = evaluate_marker(table, outcomes, phase="untreated", model="best",
                            direction="lower", n_boot=20).iloc[0]
    assert (lower.auc, lower.direction, lower.youden_threshold) == (1.0, "lower", -2.0)
    assert lower.p_value == pytest.approx(only.p_value.iloc[0])
    with pytest.raises(UsageError, match="no fits of model 'gompertz'"):
        evaluate_marker(table, outcomes, model="gompertz")
    with pytest.raises(UsageError, match="no column 'alpha'"):
        evaluate_marker(table, outcomes, figures=("alpha",))


def test_one_class_phase_is_reported_not_raised():
    fits, outcomes = _tables([2.0, 3.0], [1.0])
    fits.loc[2, "beta"] = np.nan
    row = evaluate_marker(fits, outcomes, n_boot=20).iloc[0]
    assert row.status == "one-class" and "no negative lesions" in row.note


def test_every_output_column_is_documented():
    row = evaluate_marker(*_tables(C24_POS, C24_NEG), n_boot=20)
    assert list(row.columns) == list(COLUMNS)


def test_outcome_rows_for_unknown_subjects_are_listed_not_ignored(tmp_path, capsys):
    # Reference: README (bad input): rows naming unknown subjects are listed in errors.tsv and
    # the exit status is 1; the AUC is that of the known rows (C24: 1.0 for separated values).
    from pipeline.io.tsv import read_table, write_table
    from pipeline.run.commands import evaluate_only

    fits, outcomes = _tables([2.0, 3.0, 2.5], [1.0, 0.5, 1.5])
    write_table(fits, tmp_path / "fits.tsv")
    extra = pd.DataFrame({"subject": ["zz"], "lesion": [1], "outcome": ["1"]})
    write_table(pd.concat([outcomes, extra]), tmp_path / "outcomes.tsv")
    assert evaluate_only(tmp_path, tmp_path / "outcomes.tsv", figures=("beta",), phase=None,
                         model="power", positive=None) == 1
    errors = read_table(tmp_path / "errors.tsv")
    assert errors[["subject", "stage"]].values.tolist() == [["zz", "evaluate"]]
    assert "outcomes.tsv row 8: subject 'zz' is not in the run" in errors.reason[0]
    assert "zz" in capsys.readouterr().err
    row = read_table(tmp_path / "evaluation.tsv").iloc[0]
    assert (row.auc, row.n_positive, row.n_left_out) == (1.0, 3, 0)
