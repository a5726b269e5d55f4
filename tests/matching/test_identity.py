"""Lesion identities through QA corrections and through a merge followed by a separation.

Invariant checked on every result (contract, rules behind ``longitudinal.tsv``; common practice
for link tables): every component has an incoming link from its own lesion, or from the lesion it
had merged into, unless its lesion starts at that session (``new``, or ``present`` at the first
session); the link table's lesion ids agree with the assignment table.
"""
from __future__ import annotations

import numpy as np
import pandas as pd
import pytest
import SimpleITK as sitk

from pipeline.api import fit_growth
from pipeline.config import Config
from pipeline.matching.links import match_subject
from pipeline.settings import FitSettings
from tests.match_fixtures import ISO, OBLIQUE, Sphere, make_series, pair_precision_recall


def assert_identity_invariants(result):
    lon = result.longitudinal.set_index(["lesion", "session"])
    order = list(dict.fromkeys(result.longitudinal.sort_values("day").session))
    lesion = {(r.session, r.component): r.lesion for r in result.assignment.itertuples()}
    first = result.longitudinal.groupby("lesion").session.first().to_dict()
    for m in result.matches.itertuples():
        assert (m.lesion_from, m.lesion_to) == (lesion[(m.session_from, m.component_from)],
                                                lesion[(m.session_to, m.component_to)])
    for (session, component), own in lesion.items():
        row = lon.loc[(own, session)]
        assert row.status in ("new", "present") and row.components >= 1
        if session == first[own]:
            assert row.status == ("present" if session == order[0] else "new")
            continue
        into = result.matches[(result.matches.session_to == session)
                              & (result.matches.component_to == component)]
        assert any(m.lesion_from == own or (lon.loc[(own, m.session_from)].status == "merged"
                                            and lon.loc[(own, m.session_from)].merged_into
                                            == str(m.lesion_from)) for m in into.itertuples()), \
            f"session {session} component {component} (lesion {own}) has no incoming link"
    counts = result.assignment.groupby(["lesion", "session"]).size()
    for (own, session), row in lon.iterrows():
        assert row.components == counts.get((own, session), 0)
        assert (row.status in ("new", "present")) == (row.components > 0)


def _corrections(*rows):
    return pd.DataFrame(rows, columns=["subject", "session", "component", "lesion"])


def _lesion(result, session, component):
    table = result.assignment
    return int(table[(table.session == session) & (table.component == component)].lesion.iloc[0])


def _statuses(result, lesion):
    table = result.longitudinal
    return table[table.lesion == lesion][["session", "status"]].values.tolist()


def _dice_direct(scans, a, b):
    """Dice of two components of scans on one grid, by counting voxels (common practice)."""
    (sa, ca), (sb, cb) = a, b
    ma = scans[sa].full_components() == ca
    mb = scans[sb].full_components() == cb
    return 2 * np.count_nonzero(ma & mb) / (np.count_nonzero(ma) + np.count_nonzero(mb))


def _sitk(mask, affine):
    """SimpleITK image of an (x, y, z) mask with a RAS+ affine (ITK works in LPS+)."""
    lps = np.diag([-1.0, -1.0, 1.0]) @ affine[:3, :3]
    spacing = np.linalg.norm(lps, axis=0)
    image = sitk.GetImageFromArray(mask.astype(np.uint8).transpose(2, 1, 0).copy())
    image.SetSpacing(spacing.tolist())
    image.SetDirection((lps / spacing).ravel().tolist())
    image.SetOrigin((np.diag([-1.0, -1.0, 1.0]) @ affine[:3, 3]).tolist())
    return image


def _dice_sitk(fine_scan, fine_comp, coarse_scan, coarse_comp):
    """Dice on the finer grid after SimpleITK nearest-neighbour resampling of the coarser mask."""
    # Reference: SimpleITK Resample (sitkNearestNeighbor) and LabelOverlapMeasuresImageFilter
    # (GetDiceCoefficient), general-purpose reference library.
    fine = _sitk(fine_scan.full_components() == fine_comp, fine_scan.affine)
    coarse = _sitk(coarse_scan.full_components() == coarse_comp, coarse_scan.affine)
    moved = sitk.Resample(coarse, fine, sitk.Transform(), sitk.sitkNearestNeighbor, 0)
    measures = sitk.LabelOverlapMeasuresImageFilter()
    measures.Execute(fine, moved)
    return measures.GetDiceCoefficient(1)


# ---- corrections: the sessions after a correction follow it --------------------------------
def _growing_series():
    return make_series([(str(s), 30 * (s - 1), [Sphere("A", (-10, 0, 0), 5 + s)], ISO)
                        for s in range(1, 5)])


def test_detached_component_takes_its_continuation_along():
    scans, lesions, _ = _growing_series()
    auto = match_subject(scans, lesions)
    assert set(auto.assignment.lesion) == {1}
    fixed = match_subject(scans, lesions, corrections=_corrections(("01", "2", 1, "new")))
    assert_identity_invariants(fixed)
    assert _statuses(fixed, 1) == [["1", "present"], ["2", "absent"], ["3", "absent"],
                                   ["4", "absent"]]
    assert _statuses(fixed, 2) == [["2", "new"], ["3", "present"], ["4", "present"]]
    links = fixed.matches.set_index(["session_from", "session_to"])
    assert list(links.index) == [("2", "3"), ("3", "4")]
    assert links.loc[("2", "3")].corrected and not links.loc[("3", "4")].corrected
    # The continuation's overlap equals Dice by direct voxel count on the shared 1 mm grid
    # (concentric spheres of radius 7 and 8 mm: about 2 * 7^3 / (7^3 + 8^3) = 0.80).
    assert links.loc[("2", "3")].overlap == pytest.approx(_dice_direct(scans, (1, 1), (2, 1)))
    assert 0.75 < links.loc[("2", "3")].overlap < 0.85
    assert fixed.longitudinal.corrected.sum() == 1


def test_detaching_the_last_session_leaves_earlier_sessions_alone():
    scans, lesions, _ = _growing_series()
    auto = match_subject(scans, lesions)
    fixed = match_subject(scans, lesions, corrections=_corrections(("01", "4", 1, "new")))
    assert_identity_invariants(fixed)
    assert _statuses(fixed, 1)[-1] == ["4", "absent"] and _statuses(fixed, 2) == [["4", "new"]]
    pd.testing.assert_frame_equal(auto.matches.iloc[:2], fixed.matches)


def _reappearing_series():
    a, b = Sphere("A", (-10, 0, 0), 6), Sphere("B", (10, 4, 0), 5)
    series = [("1", 0, [a, b], ISO)] + [(s, 30 * int(s), [a], ISO) for s in "234"]
    series += [("5", 150, [a, b], ISO), ("6", 180, [a, Sphere("B", (10, 4, 0), 6)], ISO)]
    return make_series(series)


def test_moved_component_takes_its_continuation_along():
    scans, lesions, truth = _reappearing_series()
    auto = match_subject(scans, lesions)
    assert set(auto.assignment.lesion) == {1, 2, 3}       # B came back after 3 absent sessions
    b5 = int(auto.assignment.query("session == '5' and lesion == 3").component.iloc[0])
    fixed = match_subject(scans, lesions, corrections=_corrections(("01", "5", b5, 2)))
    assert_identity_invariants(fixed)
    assert set(fixed.assignment.lesion) == {1, 2}
    assert pair_precision_recall(fixed.assignment, truth) == (1.0, 1.0)
    assert [s for s, status in _statuses(fixed, 2) if status == "present"] == ["1", "5", "6"]


def test_link_marked_wrong_in_a_split():
    # The report's "wrong" mark detaches the later component ('new'); its next session follows.
    a1, a2 = Sphere("A1", (-6, 0, 0), 4), Sphere("A2", (6, 0, 0), 4)
    scans, lesions, truth = make_series([("1", 0, [Sphere("A", (0, 0, 0), 8)], ISO),
                                         ("2", 30, [a1, a2], ISO), ("3", 60, [a1, a2], ISO)])
    auto = match_subject(scans, lesions)
    assert set(auto.assignment.lesion) == {1} and "splits" in set(auto.matches.relation)
    a2_at_2 = next(c for (s, c), names in truth.items() if s == "2" and "A2" in names)
    a2_at_3 = next(c for (s, c), names in truth.items() if s == "3" and "A2" in names)
    fixed = match_subject(scans, lesions, corrections=_corrections(("01", "2", a2_at_2, "new")))
    assert_identity_invariants(fixed)
    assert _lesion(fixed, "3", a2_at_3) == _lesion(fixed, "2", a2_at_2) == 2
    assert _statuses(fixed, 2) == [["2", "new"], ["3", "present"]]
    assert fixed.longitudinal.query("lesion == 1").components.tolist() == [1, 1, 1]


def _three_lesions():
    spheres = [Sphere("A", (-14, 0, 0), 6), Sphere("B", (12, 8, 0), 5),
               Sphere("C", (0, -15, 6), 4)]
    return make_series([(str(s), 30 * s, spheres, ISO) for s in range(1, 5)])


def test_every_single_correction_keeps_the_invariants():
    scans, lesions, _ = _three_lesions()
    auto = match_subject(scans, lesions)
    at_first = {r.lesion: r.component for r in auto.assignment.itertuples() if r.session == "1"}
    for r in auto.assignment.itertuples():
        for value in ["new"] + [lesion for lesion in (1, 2, 3) if lesion != r.lesion]:
            fixed = match_subject(scans, lesions,
                                  corrections=_corrections(("01", r.session, r.component, value)))
            assert_identity_invariants(fixed)
            moved = _lesion(fixed, r.session, r.component)
            if value == "new":
                assert moved not in {_lesion(fixed, "1", c) for c in at_first.values()} \
                    or r.session == "1"
            else:             # the moved component joins the named lesion's track
                assert moved == _lesion(fixed, "1", at_first[value])


def test_several_corrections_in_one_subject():
    scans, lesions, _ = _three_lesions()
    # A at session 2 detached, C at session 3 moved into B, B at session 4 detached.
    auto = match_subject(scans, lesions)
    comp = {(r.session, r.lesion): r.component for r in auto.assignment.itertuples()}
    fixed = match_subject(scans, lesions, corrections=_corrections(
        ("01", "2", comp[("2", 1)], "new"), ("01", "3", comp[("3", 3)], 2),
        ("01", "4", comp[("4", 2)], "new")))
    assert_identity_invariants(fixed)
    track = {(r.session, r.component): r.lesion for r in fixed.assignment.itertuples()}
    # A's sessions 2-4 are one detached lesion; C from session 3 on follows into B; B at
    # session 4 (and C's continuation linked to it) is detached at the last session.
    assert track[("2", comp[("2", 1)])] == track[("3", comp[("3", 1)])] \
        == track[("4", comp[("4", 1)])] != track[("1", comp[("1", 1)])]
    assert track[("3", comp[("3", 3)])] == track[("3", comp[("3", 2)])] \
        == track[("1", comp[("1", 2)])]
    assert track[("4", comp[("4", 2)])] != track[("3", comp[("3", 2)])]
    assert fixed.longitudinal.corrected.sum() == 3


# ---- merge, then separation ---------------------------------------------------------------
def _merge_then_separate(grid_at_merge=ISO):
    return make_series([
        ("1", 0, [Sphere("A", (-6.5, 0, 0), 6), Sphere("B", (6.5, 0, 0), 4.5)], ISO),
        ("2", 30, [Sphere("A", (-5.5, 0, 0), 7), Sphere("B", (5.5, 0, 0), 4.5)], grid_at_merge),
        ("3", 60, [Sphere("A", (-7.5, 0, 0), 7.5), Sphere("B", (7.5, 0, 0), 3.5)], ISO),
        ("4", 90, [Sphere("A", (-7.5, 0, 0), 8), Sphere("B", (7.5, 0, 0), 3)], ISO),
        ("5", 120, [Sphere("A", (-8, 0, 0), 8.5), Sphere("B", (8, 0, 0), 2.5)], ISO)])


@pytest.mark.parametrize("grid", [ISO, OBLIQUE], ids=["iso-1mm", "oblique-0.9x0.9x3"])
def test_merged_lesion_takes_its_id_back_after_separation(grid):
    scans, lesions, truth = _merge_then_separate(grid)
    assert lesions.groupby("session").size().tolist() == [2, 1, 2, 2, 2]
    result = match_subject(scans, lesions)
    assert_identity_invariants(result)
    part = {(s, n): c for (s, c), names in truth.items() for n in names}
    for s in "1345":
        assert (_lesion(result, s, part[(s, "A")]), _lesion(result, s, part[(s, "B")])) == (1, 2)
    lon = result.longitudinal.set_index(["lesion", "session"])
    assert lon.loc[(2, "2")].status == "merged" and lon.loc[(2, "2")].merged_into == "1"
    assert lon.loc[2].status.tolist() == ["present", "merged", "present", "present", "present"]
    assert lon.loc[1].merged_from.tolist() == ["", "2", "", "", ""]
    assert lon.loc[1].components.tolist() == [1, 1, 1, 1, 1]
    # Opposite trends are visible again: A grows, B shrinks after the separation.
    assert np.all(np.diff(lon.loc[1].volume_mm3.iloc[2:]) > 0)
    assert np.all(np.diff(lon.loc[2].volume_mm3.iloc[2:]) < 0)
    into_b = result.matches.query("session_to == '3' and lesion_to == 2").iloc[0]
    assert "separated" in into_b.review_reason and into_b.review
    # The link's overlap against an independent Dice: voxel count on the shared grid, or
    # SimpleITK nearest-neighbour resampling of the coarser (oblique) blob onto the 1 mm grid.
    blob = (1, int(into_b.component_from))
    expected = (_dice_direct(scans, blob, (2, part[("3", "B")])) if grid is ISO else
                _dice_sitk(scans[2], part[("3", "B")], scans[1], blob[1]))
    assert into_b.overlap == pytest.approx(expected, abs=0.01)
    assert into_b.overlap > 0


def test_both_lesions_are_fitted_after_separation():
    scans, lesions, _ = _merge_then_separate()
    result = match_subject(scans, lesions)
    config = Config(fitting=FitSettings(models=("exponential",)))
    fits, _, _ = fit_growth(result.longitudinal.assign(group=""), config=config)
    rows = fits.set_index("lesion")
    assert sorted(rows.index) == [1, 2]
    assert rows.loc[1].n_points == rows.loc[2].n_points == 4       # the merged session left out
    assert rows.loc[1].alpha > 0 > rows.loc[2].alpha               # dV/dt = alpha V


def test_separated_part_that_left_the_blob_returns_to_its_lesion():
    # B moves away from the merged blob: no link from the blob, but it lies where B was last
    # seen on its own, so it takes B's id back with a link from there (flagged for review).
    scans, lesions, truth = make_series([
        ("1", 0, [Sphere("A", (-6, 0, 0), 6), Sphere("B", (10, 0, 0), 4)], ISO),
        ("2", 30, [Sphere("A", (-4, 0, 0), 7), Sphere("B", (6, 0, 0), 4)], ISO),
        ("3", 60, [Sphere("A", (-6, 0, 0), 7), Sphere("B", (13, 0, 0), 2.5)], ISO)])
    assert lesions.groupby("session").size().tolist() == [2, 1, 2]
    result = match_subject(scans, lesions)
    assert_identity_invariants(result)
    b3 = next(c for (s, c), names in truth.items() if s == "3" and "B" in names)
    assert _lesion(result, "3", b3) == 2
    into = result.matches.query("session_to == '3' and lesion_to == 2").iloc[0]
    assert into.session_from == "1" and "separated" in into.review_reason
    assert _statuses(result, 2) == [["1", "present"], ["2", "merged"], ["3", "present"]]


def test_merge_without_separation_is_unchanged():
    scans, lesions, _ = make_series([
        ("1", 0, [Sphere("A", (-6.5, 0, 0), 6), Sphere("B", (6.5, 0, 0), 4)], ISO),
        ("2", 30, [Sphere("A", (-5.5, 0, 0), 7), Sphere("B", (5.5, 0, 0), 5)], ISO),
        ("3", 60, [Sphere("A", (-5.5, 0, 0), 7), Sphere("B", (5.5, 0, 0), 5)], ISO)])
    result = match_subject(scans, lesions)
    assert_identity_invariants(result)
    assert _statuses(result, 2) == [["1", "present"], ["2", "merged"], ["3", "merged"]]


def test_two_lesions_merged_one_after_the_other_both_separate():
    S = Sphere
    scans, lesions, truth = make_series([
        ("1", 0, [S("A", (-8, 0, 0), 6), S("B", (6, 0, 0), 4), S("C", (-8, 13, 0), 4)], ISO),
        ("2", 30, [S("A", (-6, 0, 0), 7), S("B", (5, 0, 0), 4), S("C", (-8, 13, 0), 4)], ISO),
        ("3", 60, [S("A", (-6, 2, 0), 8), S("B", (5, 0, 0), 4), S("C", (-8, 11, 0), 4.5)], ISO),
        ("4", 90, [S("A", (-8, 0, 0), 6), S("B", (7, 0, 0), 3.5), S("C", (-8, 14, 0), 4)], ISO)])
    assert lesions.groupby("session").size().tolist() == [3, 2, 1, 3]
    result = match_subject(scans, lesions)
    assert_identity_invariants(result)
    ids = {name: _lesion(result, "1", c) for (s, c), names in truth.items() if s == "1"
           for name in names}
    for (s, c), names in truth.items():
        if s == "4":
            (name,) = names
            assert _lesion(result, "4", c) == ids[name]
    lon = result.longitudinal.set_index(["lesion", "session"])
    assert lon.loc[ids["A"]].merged_from.tolist() == [
        "", str(ids["B"]), ",".join(sorted(str(ids[n]) for n in "BC")), ""]
    assert lon.loc[ids["B"]].status.tolist() == ["present", "merged", "merged", "present"]
    assert lon.loc[ids["C"]].status.tolist() == ["present", "present", "merged", "present"]
