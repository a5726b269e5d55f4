"""Stage 2 on synthetic series with known truth: links, ids, statuses, warnings."""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from pipeline.errors import InputError
from pipeline.matching.links import (COLUMNS, LONGITUDINAL_COLUMNS, MATCHES_COLUMNS,
                                     _session_links, match_subject)
from pipeline.matching.overlap import Evidence
from pipeline.settings import MatchSettings
from tests.match_fixtures import (ANISO, FLIPPED, ISO, OBLIQUE, Sphere, label_scan,
                                  link_precision_recall, make_series, pair_precision_recall)

CONTRACT_MATCHES = ["subject", "session_from", "component_from", "session_to", "component_to",
                    "relation", "overlap", "centroid_distance_mm"]
CONTRACT_LONGITUDINAL = ["subject", "lesion", "session", "day", "volume_mm3", "status",
                         "components"]


def comp(truth, session, name):
    """The component of ``session`` that holds truth sphere ``name``."""
    (found,) = [c for (s, c), names in truth.items() if s == session and name in names]
    return found


def links(truth, *pairs):
    return {(a, comp(truth, a, n), b, comp(truth, b, m)) for a, n, b, m in pairs}


def row(result, lesion, session):
    table = result.longitudinal
    (found,) = table[(table.lesion == lesion) & (table.session == session)].to_dict("records")
    return found


def lesion_of(result, session, component):
    table = result.assignment
    return int(table[(table.session == session) & (table.component == component)].lesion.iloc[0])


def test_continuation_under_growth_and_shrinkage():
    sessions = [("1", 0, [Sphere("A", (-12, 0, 0), 5), Sphere("B", (10, 8, 0), 6),
                          Sphere("C", (0, -15, 5), 3)], ISO),
                ("2", 40, [Sphere("A", (-12, 0, 0), 7), Sphere("B", (10, 8, 0), 4),
                           Sphere("C", (0, -15, 5), 3)], ISO),
                ("3", 80, [Sphere("A", (-12, 1, 0), 9), Sphere("B", (10, 8, 0), 3),
                           Sphere("C", (0, -15, 5), 3.5)], ISO)]
    scans, lesions, truth = make_series(sessions)
    result = match_subject(scans, lesions)
    expected = links(truth, *[(s, n, t, n) for s, t in (("1", "2"), ("2", "3")) for n in "ABC"])
    assert link_precision_recall(result.matches, expected) == (1.0, 1.0)
    assert pair_precision_recall(result.assignment, truth) == (1.0, 1.0)
    assert set(result.matches.relation) == {"continues"}
    # docs/outputs.md §4.5: ids by first appearance, ties by larger volume: B (r 6) > A (r 5) > C (r
    # 3).
    assert [lesion_of(result, "1", comp(truth, "1", n)) for n in "BAC"] == [1, 2, 3]
    assert set(result.longitudinal.status) == {"present"}
    merged = lesions.merge(result.assignment, on=["subject", "session", "component"])
    sums = merged.groupby(["lesion", "session"]).volume_mm3.sum()
    for r in result.longitudinal.itertuples():
        assert r.volume_mm3 == pytest.approx(sums[(r.lesion, r.session)])
    assert result.warnings == ()
    assert list(result.matches.columns[:8]) == CONTRACT_MATCHES
    assert list(result.longitudinal.columns[:7]) == CONTRACT_LONGITUDINAL


def test_regrid_oblique_and_flipped_storage():
    a, b = Sphere("A", (-10, 0, 0), 6), Sphere("B", (10, 5, 0), 4)
    sessions = [("1", 0, [a, b], ISO),
                ("2", 30, [Sphere("A", (-10, 0, 0), 8), Sphere("B", (10, 5, 0), 3)], ANISO),
                ("3", 60, [Sphere("A", (-10, 1, 0), 7), Sphere("B", (10, 5, 0), 5)], OBLIQUE),
                ("4", 90, [Sphere("A", (-10, 1, 0), 7), Sphere("B", (10, 5, 0), 5)], FLIPPED)]
    scans, lesions, truth = make_series(sessions)
    result = match_subject(scans, lesions)
    expected = links(truth, *[(s, n, t, n) for s, t in (("1", "2"), ("2", "3"), ("3", "4"))
                              for n in "AB"])
    assert link_precision_recall(result.matches, expected) == (1.0, 1.0)
    assert pair_precision_recall(result.assignment, truth) == (1.0, 1.0)
    # The same spheres on the oblique and the flipped grid overlap well (common practice:
    # voxelisation at 0.9 x 0.9 x 3 mm of a 5 mm sphere keeps Dice above 0.7).
    last = result.matches[result.matches.session_to == "4"]
    assert (last.overlap > 0.7).all()
    assert result.warnings == ()


def test_split_keeps_one_id_with_summed_volume():
    sessions = [("1", 0, [Sphere("A", (0, 0, 0), 7)], ISO),
                ("2", 30, [Sphere("A1", (-5.5, 0, 0), 4), Sphere("A2", (5.5, 0, 0), 4)], ISO),
                ("3", 60, [Sphere("A1", (-5.5, 0, 0), 4), Sphere("A2", (5.5, 0, 0), 4)], ISO)]
    scans, lesions, truth = make_series(sessions)
    result = match_subject(scans, lesions)
    a = comp(truth, "1", "A")
    expected = {("1", a, "2", comp(truth, "2", "A1")), ("1", a, "2", comp(truth, "2", "A2"))}
    expected |= links(truth, ("2", "A1", "3", "A1"), ("2", "A2", "3", "A2"))
    assert link_precision_recall(result.matches, expected) == (1.0, 1.0)
    relations = result.matches.set_index("session_to").relation
    assert list(relations["2"]) == ["splits", "splits"]
    assert list(relations["3"]) == ["continues", "continues"]
    assert result.longitudinal.lesion.unique().tolist() == [1]
    second = row(result, 1, "2")
    assert second["components"] == 2 and second["status"] == "present"
    assert second["volume_mm3"] == pytest.approx(lesions[lesions.session == "2"].volume_mm3.sum())


def test_merge_larger_parent_survives():
    sessions = [("1", 0, [Sphere("A", (-6.5, 0, 0), 6), Sphere("B", (6.5, 0, 0), 4)], ISO),
                ("2", 30, [Sphere("A", (-5.5, 0, 0), 7), Sphere("B", (5.5, 0, 0), 5)], ISO),
                ("3", 60, [Sphere("A", (-5.5, 0, 0), 7), Sphere("B", (5.5, 0, 0), 5)], ISO)]
    scans, lesions, truth = make_series(sessions)
    assert len(lesions[lesions.session == "2"]) == 1    # the two spheres touch: one component
    result = match_subject(scans, lesions)
    expected = links(truth, ("1", "A", "2", "A"), ("1", "B", "2", "B"), ("2", "A", "3", "A"))
    assert link_precision_recall(result.matches, expected) == (1.0, 1.0)
    assert list(result.matches.relation) == ["merges", "merges", "continues"]
    survivor = lesion_of(result, "1", comp(truth, "1", "A"))
    absorbed = lesion_of(result, "1", comp(truth, "1", "B"))
    assert (survivor, absorbed) == (1, 2)
    for session in ("2", "3"):
        kept, gone = row(result, survivor, session), row(result, absorbed, session)
        assert kept["status"] == "present" and kept["merged_from"] == "2"
        assert kept["volume_mm3"] == pytest.approx(
            lesions[lesions.session == session].volume_mm3.sum())
        assert gone["status"] == "merged" and gone["merged_into"] == "1"
        assert np.isnan(gone["volume_mm3"]) and gone["components"] == 0
    assert row(result, survivor, "1")["merged_from"] == ""


def test_new_lesion():
    a = Sphere("A", (-10, 0, 0), 6)
    sessions = [("1", 0, [a], ISO), ("2", 30, [a, Sphere("N", (12, 6, 0), 3)], ISO),
                ("3", 60, [a, Sphere("N", (12, 6, 0), 4)], ISO)]
    scans, lesions, truth = make_series(sessions)
    result = match_subject(scans, lesions)
    expected = links(truth, ("1", "A", "2", "A"), ("2", "A", "3", "A"), ("2", "N", "3", "N"))
    assert link_precision_recall(result.matches, expected) == (1.0, 1.0)
    new = lesion_of(result, "2", comp(truth, "2", "N"))
    assert new == 2
    statuses = result.longitudinal[result.longitudinal.lesion == new]
    assert statuses[["session", "status"]].values.tolist() == [["2", "new"], ["3", "present"]]


def _vanishing(absent_sessions: int):
    a, b = Sphere("A", (-10, 0, 0), 6), Sphere("B", (10, 4, 0), 5)
    sessions = [("1", 0, [a, b], ISO)]
    sessions += [(str(2 + k), 30 * (k + 1), [a], ISO) for k in range(absent_sessions)]
    last = str(2 + absent_sessions)
    sessions.append((last, 30 * (absent_sessions + 1), [a, Sphere("B", (10, 4, 0), 5.5)], ISO))
    return make_series(sessions), last


def test_vanish_and_reappear_within_max_gap():
    (scans, lesions, truth), last = _vanishing(2)
    result = match_subject(scans, lesions, settings=MatchSettings(max_gap=2))
    b = lesion_of(result, "1", comp(truth, "1", "B"))
    assert lesion_of(result, last, comp(truth, last, "B")) == b
    rows = result.longitudinal[result.longitudinal.lesion == b]
    assert rows.status.tolist() == ["present", "absent", "absent", "present"]
    assert rows.volume_mm3.tolist()[1:3] == [0.0, 0.0]
    link = result.matches[result.matches.session_to == last]
    link = link[link.lesion_to == b].iloc[0]
    assert (link.session_from, link.gap) == ("1", 2) and "reappeared" in link.review_reason
    assert pair_precision_recall(result.assignment, truth) == (1.0, 1.0)


def test_vanish_beyond_max_gap_gets_new_id():
    (scans, lesions, truth), last = _vanishing(3)
    result = match_subject(scans, lesions, settings=MatchSettings(max_gap=2))
    old = lesion_of(result, "1", comp(truth, "1", "B"))
    new = lesion_of(result, last, comp(truth, last, "B"))
    assert new != old and new == 3
    assert result.longitudinal[result.longitudinal.lesion == old].status.tolist() == \
        ["present"] + ["absent"] * 4
    assert row(result, new, last)["status"] == "new"
    # No rows before a lesion first appears.
    assert result.longitudinal[result.longitudinal.lesion == new].session.tolist() == [last]


def test_two_lesions_close_together():
    sessions = [("1", 0, [Sphere("A", (-6, 0, 0), 5), Sphere("B", (6, 0, 0), 5)], ISO),
                ("2", 30, [Sphere("A", (-7, 1, 0), 4), Sphere("B", (7, -1, 0), 6)], ANISO),
                ("3", 60, [Sphere("A", (-7, 0, 0), 3), Sphere("B", (6.5, 0, 0), 6.5)], ISO)]
    scans, lesions, truth = make_series(sessions)
    assert all(len(names) == 1 for names in truth.values())   # never touching
    result = match_subject(scans, lesions)
    expected = links(truth, *[(s, n, t, n) for s, t in (("1", "2"), ("2", "3")) for n in "AB"])
    assert link_precision_recall(result.matches, expected) == (1.0, 1.0)
    assert pair_precision_recall(result.assignment, truth) == (1.0, 1.0)
    assert set(result.matches.relation) == {"continues"}


def _shifted_series(shift):
    base = [Sphere("A", (-15, 0, 0), 6), Sphere("B", (12, 10, 0), 5),
            Sphere("C", (5, -14, 6), 5)]
    moved = [Sphere(s.name, tuple(np.add(s.centre, shift)), s.radius) for s in base]
    return make_series([("1", 0, base, ISO), ("2", 30, moved, ISO), ("3", 60, base, ISO)])


def test_misregistered_session_warns():
    scans, lesions, truth = _shifted_series((5.0, 0.0, 0.0))
    result = match_subject(scans, lesions)
    expected = links(truth, *[(s, n, t, n) for s, t in (("1", "2"), ("2", "3")) for n in "ABC"])
    assert link_precision_recall(result.matches, expected) == (1.0, 1.0)
    assert len(result.warnings) == 1 and "session 2:" in result.warnings[0]
    assert "5.0 mm" in result.warnings[0]
    flags = result.matches.groupby("session_to").misregistered.all()
    assert flags["2"] and not result.matches[result.matches.session_to == "3"].misregistered.any()
    assert result.matches[result.matches.session_to == "2"].session_shift_mm.iloc[0] == \
        pytest.approx(5.0, abs=0.01)


def test_transform_removes_misregistration():
    scans, lesions, _ = _shifted_series((5.0, 0.0, 0.0))
    back = np.eye(4)
    back[0, 3] = -5.0
    plain = match_subject(scans, lesions)
    result = match_subject(scans, lesions, transforms={"2": back})
    assert result.warnings == ()
    into_2 = result.matches[result.matches.session_to == "2"]
    assert (into_2.overlap > 0.99).all()
    assert (into_2.overlap > plain.matches[plain.matches.session_to == "2"].overlap).all()


def test_unshifted_series_does_not_warn():
    scans, lesions, _ = _shifted_series((0.0, 0.0, 0.0))
    assert match_subject(scans, lesions).warnings == ()


def test_scan_order_does_not_matter():
    scans, lesions, _ = _shifted_series((1.0, 0.0, 0.0))
    first = match_subject(scans, lesions)
    second = match_subject(scans[::-1], lesions.sample(frac=1.0, random_state=3))
    pd.testing.assert_frame_equal(first.longitudinal, second.longitudinal)
    pd.testing.assert_frame_equal(first.matches, second.matches)


def test_session_without_lesions():
    a = Sphere("A", (-10, 0, 0), 6)
    scans, lesions, _ = make_series([("1", 0, [a], ISO), ("2", 30, [], ISO),
                                     ("3", 60, [a], ISO)])
    assert scans[1].components.shape == (0, 0, 0)
    result = match_subject(scans, lesions)
    assert result.longitudinal.status.tolist() == ["present", "absent", "present"]


def test_assignment_c21_example():
    # Reference: docs/methods.md, check value C21 (scipy documentation example): costs
    # [[4,1,3],[2,0,5],[3,2,2]]
    # -> rows (0, 1, 2) to columns (1, 0, 2), total cost 5. Scores are 1 - cost / 10.
    cost = np.array([[4, 1, 3], [2, 0, 5], [3, 2, 2]], float)
    frontier = [(0, 1), (0, 2), (0, 3)]
    current = [(1, 1), (1, 2), (1, 3)]
    evidence = {(f, k): Evidence(0.0, 50.0, False, 9.0, 1 - cost[i, j] / 10, True)
                for i, f in enumerate(frontier) for j, k in enumerate(current)}
    found = _session_links(frontier, current, evidence, 1)
    assert [(link.src[1] - 1, link.dst[1] - 1) for link in found] == [(0, 1), (1, 0), (2, 2)]
    assert sum(10 * (1 - link.evidence.score) for link in found) == pytest.approx(5.0)
    # Gate: a forbidden pair is dropped even though the assignment must fill the row.
    evidence[((0, 3), (1, 3))] = Evidence(0.0, 50.0, False, 9.0, 0.8, False)
    evidence[((0, 3), (1, 1))] = Evidence(0.0, 50.0, False, 9.0, 0.7, False)
    evidence[((0, 3), (1, 2))] = Evidence(0.0, 50.0, False, 9.0, 0.8, False)
    assert (0, 3) not in {link.src for link in _session_links(frontier, current, evidence, 1)}


def test_lesion_rows_must_match_the_mask():
    scans, lesions, _ = make_series([("1", 0, [Sphere("A", (0, 0, 0), 4)], ISO)])
    with pytest.raises(InputError, match="lists components \\[\\] but the mask holds \\[1\\]"):
        match_subject(scans, lesions[lesions.component > 1])


def test_duplicated_session_is_refused():
    mask = np.zeros((8, 8, 8), bool)
    mask[2:4, 2:4, 2:4] = True
    scan, rows = label_scan(mask, np.eye(4), subject="01", session="1", day=0.0)
    with pytest.raises(InputError, match="session 1 is given twice"):
        match_subject([scan, scan], pd.concat([rows, rows]))


def test_columns_describe_every_output_column():
    scans, lesions, _ = _shifted_series((0.0, 0.0, 0.0))
    result = match_subject(scans, lesions)
    assert list(result.matches.columns) == list(MATCHES_COLUMNS)
    assert list(result.longitudinal.columns) == list(LONGITUDINAL_COLUMNS)
    assert set(COLUMNS) == {"matches.tsv", "longitudinal.tsv"}
    assert set(MATCHES_COLUMNS["relation"]["Levels"]) == {"continues", "splits", "merges"}
    assert set(LONGITUDINAL_COLUMNS["status"]["Levels"]) == {"new", "present", "absent",
                                                             "merged"}
