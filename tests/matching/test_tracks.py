"""Lesion ids, statuses, QA corrections and track images."""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest

from pipeline.errors import InputError
from pipeline.matching.links import match_subject, track_image
from pipeline.matching.overlap import Evidence
from pipeline.matching.tracks import Link, number_lesions, track_rows
from pipeline.volumes.components import LabelledScan
from tests.match_fixtures import ISO, Sphere, make_series, pair_precision_recall

E = Evidence(0.5, 1.0, True, 0.2, 0.7, True)


def _keyed_links(result):
    return {(r.session_from, r.component_from, r.session_to, r.component_to): r.corrected
            for r in result.matches.itertuples()}


def _partition(result, keep):
    """Components grouped by lesion, restricted to the components in ``keep``."""
    groups: dict[int, set] = {}
    for r in result.assignment.itertuples():
        if (r.session, r.component) in keep:
            groups.setdefault(r.lesion, set()).add((r.session, r.component))
    return sorted(sorted(g) for g in groups.values())


def _three_lesions():
    spheres = [Sphere("A", (-14, 0, 0), 6), Sphere("B", (12, 8, 0), 5),
               Sphere("C", (0, -15, 6), 4)]
    return make_series([(str(s), 30 * s, spheres, ISO) for s in range(1, 5)])


def _corrections(*rows):
    return pd.DataFrame(rows, columns=["subject", "session", "component", "lesion"])


def _check_only_named_links_changed(auto, corrected, named):
    touched = lambda key: (key[0], key[1]) in named or (key[2], key[3]) in named  # noqa: E731
    before = {k for k in _keyed_links(auto) if not touched(k)}
    after = {k for k in _keyed_links(corrected) if not touched(k)}
    assert before == after
    assert not any(v for k, v in _keyed_links(corrected).items() if not touched(k))
    keys = {(r.session, r.component) for r in auto.assignment.itertuples()} - set(named)
    assert _partition(auto, keys) == _partition(corrected, keys)


def test_ids_by_first_appearance_then_volume():
    membership = {(0, 1): "x", (0, 2): "y", (1, 1): "z", (1, 2): "x", (2, 1): "w"}
    volumes = {(0, 1): 5.0, (0, 2): 5.0, (1, 1): 1.0, (1, 2): 99.0, (2, 1): 3.0}
    # Tie at the first session (equal volumes): smaller component first.
    assert number_lesions(membership, volumes) == {"x": 1, "y": 2, "z": 3, "w": 4}


def test_merge_chain_resolves_to_final_survivor():
    # Lesion 3 merges into 2 at session 1; lesion 2 merges into 1 at session 2.
    membership = {(0, 1): 1, (0, 2): 2, (0, 3): 3, (1, 1): 1, (1, 2): 2, (2, 1): 1}
    volumes = {k: 10.0 for k in membership}
    links = [Link((0, 1), (1, 1), E, True), Link((0, 2), (1, 2), E, True),
             Link((0, 3), (1, 2), E, False), Link((1, 1), (2, 1), E, True),
             Link((1, 2), (2, 1), E, False)]
    rows = {(r["lesion"], r["session_index"]): r for r in track_rows(3, membership, volumes,
                                                                      links)}
    assert rows[(3, 1)]["status"] == "merged" and rows[(3, 1)]["merged_into"] == "2"
    assert rows[(2, 1)]["merged_from"] == "3"
    assert rows[(3, 2)]["merged_into"] == "1" and rows[(2, 2)]["merged_into"] == "1"
    assert rows[(1, 2)]["merged_from"] == "2,3" and rows[(1, 2)]["volume_mm3"] == 10.0


def test_no_rows_before_first_appearance_and_new_status():
    membership = {(0, 1): 1, (2, 1): 1, (2, 2): 2}
    rows = track_rows(3, membership, {k: 1.0 for k in membership},
                      [Link((0, 1), (2, 1), E, True)])
    assert [(r["lesion"], r["session_index"], r["status"]) for r in rows] == [
        (1, 0, "present"), (1, 1, "absent"), (1, 2, "present"), (2, 2, "new")]


def test_correction_moves_a_reappearing_lesion_back_to_its_id():
    a, b = Sphere("A", (-10, 0, 0), 6), Sphere("B", (10, 4, 0), 5)
    series = [("1", 0, [a, b], ISO)] + [(s, 30 * int(s), [a], ISO) for s in "234"]
    series.append(("5", 150, [a, b], ISO))
    scans, lesions, truth = make_series(series)
    auto = match_subject(scans, lesions)
    assert set(auto.assignment.lesion) == {1, 2, 3}      # B came back after 3 absent sessions
    corrections = _corrections(("01", "5", 2, "2"))
    fixed = match_subject(scans, lesions, corrections=corrections)
    assert set(fixed.assignment.lesion) == {1, 2}
    assert pair_precision_recall(fixed.assignment, truth) == (1.0, 1.0)
    added = fixed.matches[fixed.matches.corrected]
    assert added[["session_from", "component_from", "session_to", "component_to"]
                 ].values.tolist() == [["1", 2, "5", 2]]
    assert fixed.assignment.set_index(["session", "component"]).corrected.to_dict() == {
        ("1", 1): False, ("1", 2): False, ("2", 1): False, ("3", 1): False, ("4", 1): False,
        ("5", 1): False, ("5", 2): True}
    assert fixed.longitudinal[(fixed.longitudinal.lesion == 2)].status.tolist() == \
        ["present", "absent", "absent", "absent", "present"]
    assert fixed.longitudinal.corrected.sum() == 1
    _check_only_named_links_changed(auto, fixed, {("5", 2)})


def test_correction_detaches_components_into_one_new_lesion():
    scans, lesions, _ = _three_lesions()
    auto = match_subject(scans, lesions)
    target = auto.assignment[(auto.assignment.lesion == 3)]
    named = {("3", int(target[target.session == "3"].component.iloc[0])),
             ("4", int(target[target.session == "4"].component.iloc[0]))}
    fixed = match_subject(scans, lesions,
                          corrections=_corrections(*[("01", s, c, "new") for s, c in named]))
    ids = {lesion for (s, c) in named for lesion in fixed.assignment[
        (fixed.assignment.session == s) & (fixed.assignment.component == c)].lesion}
    assert len(ids) == 1                                 # linked 'new' components stay together
    new = ids.pop()
    assert fixed.longitudinal[fixed.longitudinal.lesion == new].status.tolist() == \
        ["new", "present"]
    old = fixed.longitudinal[fixed.longitudinal.lesion == 3]
    assert old.status.tolist() == ["present", "present", "absent", "absent"]
    _check_only_named_links_changed(auto, fixed, named)
    # The link between the two detached components is kept; the one into them is dropped.
    assert ("2", 3, "3", 3) not in _keyed_links(fixed) and ("3", 3, "4", 3) in _keyed_links(fixed)


def test_correction_joins_two_lesions():
    scans, lesions, _ = _three_lesions()
    auto = match_subject(scans, lesions)
    b_rows = auto.assignment[auto.assignment.lesion == 2]
    corrections = _corrections(*[("01", r.session, r.component, 1) for r in b_rows.itertuples()])
    fixed = match_subject(scans, lesions, corrections=corrections)
    assert set(fixed.assignment.lesion) == {1, 2}        # C is renumbered 3 -> 2
    joined = fixed.longitudinal[fixed.longitudinal.lesion == 1]
    assert joined.components.tolist() == [2, 2, 2, 2]
    sums = lesions[lesions.component.isin([1, 2])].groupby("session").volume_mm3.sum()
    assert joined.volume_mm3.tolist() == pytest.approx(sums.tolist())
    assert joined.corrected.all()
    _check_only_named_links_changed(auto, fixed, {(r.session, r.component)
                                                  for r in b_rows.itertuples()})


def test_correction_with_the_automatic_lesion_changes_nothing():
    scans, lesions, _ = _three_lesions()
    auto = match_subject(scans, lesions)
    same = match_subject(scans, lesions, corrections=_corrections(("01", "2", 1, 1),
                                                                  ("02", "9", 9, 9)))
    pd.testing.assert_frame_equal(auto.matches, same.matches)
    assert same.assignment.corrected.sum() == 1


@pytest.mark.parametrize("row, message", [
    (("01", "7", 1, 1), "qa/fixes.tsv line 2: subject 01 has no session '7'"),
    (("01", "2", 9, 1), "qa/fixes.tsv line 2: subject 01 session 2 has no component 9"),
    (("01", "2", 1, 8), "qa/fixes.tsv line 2: subject 01 has no lesion 8"),
    (("01", "2", 1, "maybe"), "qa/fixes.tsv line 2: subject 01 has no lesion 'maybe'"),
])
def test_unknown_correction_ids_are_input_errors(row, message):
    # The message names the table as the caller gave it, whatever the file is called.
    scans, lesions, _ = _three_lesions()
    with pytest.raises(InputError, match=message):
        match_subject(scans, lesions, corrections=_corrections(row),
                      corrections_source="qa/fixes.tsv")
    with pytest.raises(InputError, match="^corrections table line 2: "):
        match_subject(scans, lesions, corrections=_corrections(row))


def test_conflicting_corrections_are_refused():
    scans, lesions, _ = _three_lesions()
    with pytest.raises(InputError, match="line 3: session 2 component 1 is corrected twice"):
        match_subject(scans, lesions, corrections=_corrections(("01", "2", 1, 1),
                                                               ("01", "2", 1, "new")))


def test_track_images_hold_lesion_ids():
    scans, lesions, _ = _three_lesions()
    result = match_subject(scans, lesions)
    for scan in scans:
        image = track_image(scan, result.assignment)
        assert image.shape == scan.shape and image.dtype == np.uint8
        full = scan.full_components()
        for r in result.assignment[result.assignment.session == scan.session].itertuples():
            assert set(np.unique(image[full == r.component])) == {r.lesion}
        assert np.all((image > 0) == (full > 0))


@pytest.mark.parametrize("max_id, dtype", [(1, np.uint8), (255, np.uint8), (256, np.int16),
                                           (32767, np.int16), (32768, np.int32)])
def test_track_image_dtype(max_id, dtype):
    # docs/outputs.md §4.6: smallest of uint8, int16, int32 holding the largest id.
    comps = np.array([[[1, 2]]], np.int32)
    scan = LabelledScan("01", "2", 1.0, comps, (0, 1, 1), (2, 3, 4), np.eye(4))
    assignment = pd.DataFrame({"subject": "01", "session": ["1", "2", "2"],
                               "component": [1, 1, 2], "lesion": [max_id, 1, 2]})
    image = track_image(scan, assignment)
    assert image.dtype == dtype and image[0, 1, 1:3].tolist() == [1, 2]
    assert int(image.sum()) == 3


def test_track_image_of_an_empty_scan_is_zero():
    scan = LabelledScan("01", "1", 0.0, np.zeros((0, 0, 0), np.int32), (0, 0, 0), (4, 5, 6),
                        np.eye(4))
    image = track_image(scan, pd.DataFrame(columns=["subject", "session", "component",
                                                    "lesion"]))
    assert image.shape == (4, 5, 6) and image.dtype == np.uint8 and not image.any()


def test_track_image_refuses_unassigned_component():
    scan = LabelledScan("01", "1", 0.0, np.array([[[1, 2]]], np.int32), (0, 0, 0), (1, 1, 2),
                        np.eye(4))
    assignment = pd.DataFrame({"subject": ["01"], "session": ["1"], "component": [1],
                               "lesion": [1]})
    with pytest.raises(ValueError, match="components \\[2\\] have no lesion"):
        track_image(scan, assignment)
