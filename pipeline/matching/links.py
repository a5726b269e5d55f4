"""Stage 2: the components of one subject's scans -> links, lesion tracks and QA flags.

For each session in time order, every component is compared with the *frontier* of earlier
components: the components of each live lesion at the last session it was seen, provided it has
been absent for at most ``max_gap`` sessions. Comparison is in world space
(``pipeline.matching.overlap``,
which documents the score and the gate); only pairs that can pass the gate are scored, found with
a spatial index (``pipeline.matching.candidates``), and only candidate pairs are kept, so work and
memory
grow with the close pairs, not with the product of the component counts. One-to-one
continuations come from the optimal assignment (``scipy.optimize.linear_sum_assignment``) on
``1 - score``, forbidden pairs carrying a large finite cost and dropped afterwards (solved per
connected part of the candidate graph when large). A component left unassigned that overlaps (or
holds the centroid of) a frontier component joins that lesion: a split. A component of the previous
session left unassigned that overlaps a current component flows into it: a merge, whose survivor
is the parent lesion larger at its last session. Lesion labels, the return of a merged lesion
after its survivor separates again, and QA corrections (pins of a second pass, so that the
sessions after a correction follow it) are ``pipeline.matching.identity``'s; ids and statuses follow
``pipeline.matching.tracks``. Exact score ties go to the frontier component of the more recent
session.

Columns added: ``matches`` (``MATCHES_COLUMNS``), ``longitudinal`` (``LONGITUDINAL_COLUMNS``),
``assignment`` (``ASSIGNMENT_COLUMNS``). Research use only; see ``pipeline.DISCLAIMER``.
"""
from __future__ import annotations

from collections import defaultdict
from collections.abc import Callable, Hashable, Mapping, Sequence
from dataclasses import dataclass

import numpy as np
import pandas as pd

from pipeline.matching.candidates import session_evidence, sparse_assignment
from pipeline.errors import InputError
from pipeline.matching.overlap import Evidence, ScanGeometry, pair_evidence, scan_geometry
from pipeline.settings import MatchSettings
from pipeline.matching.identity import LesionBook, correction_pins
from pipeline.matching.tracks import (CompKey, Link, link_relations, mark_corrected,
                                      number_lesions, parse_corrections, track_image, track_rows)
from pipeline.volumes.components import LabelledScan

__all__ = ["MatchResult", "match_subject", "track_image", "COLUMNS", "MATCHES_COLUMNS",
           "LONGITUDINAL_COLUMNS", "ASSIGNMENT_COLUMNS"]

_BOOL = {"true": "yes", "false": "no"}
MATCHES_COLUMNS: dict[str, dict] = {
    "subject": {"Description": "Subject label"},
    "session_from": {"Description": "Earlier session of the link (the lesion's last session "
                     "seen; not the previous session when the lesion was absent in between)"},
    "component_from": {"Description": "Component number in lesions.tsv at session_from"},
    "session_to": {"Description": "Later session of the link"},
    "component_to": {"Description": "Component number in lesions.tsv at session_to"},
    "relation": {"Description": "Kind of link", "Levels": {
        "continues": "one component continues as one component",
        "splits": "one component continues as several components",
        "merges": "several components flow into one component"}},
    "overlap": {"Description": "Dice coefficient of the two components in world space, on the "
                "finer of the two grids", "Units": "1"},
    "centroid_distance_mm": {"Description": "Distance between the component centroids (after "
                             "any registration transform)", "Units": "mm"},
    "centroid_inside": {"Description": "A centroid lies inside the other component", "Levels":
                        {"true": "yes", "false": "no"}},
    "distance_ratio": {"Description": "centroid_distance_mm over the larger equivalent radius "
                       "(at least min_radius_mm)", "Units": "1"},
    "score": {"Description": "Link score in [0, 1] from overlap, centroid_inside and "
              "distance_ratio (weights in the configuration)", "Units": "1"},
    "assigned": {"Description": "Link chosen by the one-to-one optimal assignment",
                 "Levels": _BOOL},
    "confidence": {"Description": "score minus the best score of a rival link to another lesion "
                   "(score itself without rivals)", "Units": "1"},
    "review": {"Description": "Link flagged for review by QA staff", "Levels": _BOOL},
    "review_reason": {"Description": "Why the link is flagged, comma separated: ambiguous "
                      "(a rival link to another lesion scores within ambiguity_margin), "
                      "small-overlap, large-jump (one-to-one links only), reappeared (after "
                      "absent sessions), misregistered, separated (into a part that took back "
                      "the id of a lesion merged earlier)"},
    "gap": {"Description": "Sessions between session_from and session_to where the lesion was "
            "absent", "Units": "1"},
    "lesion_from": {"Description": "Lesion id of the earlier component"},
    "lesion_to": {"Description": "Lesion id of the later component"},
    "session_shift_mm": {"Description": "Length of the common shift of session_to's matched "
                         "lesions relative to the first session (n/a with too few pairs)",
                         "Units": "mm"},
    "misregistered": {"Description": "session_to's lesions share a shift larger than "
                      "misregistration_mm", "Levels": _BOOL},
    "corrected": {"Description": "Link added or changed by a QA correction", "Levels": _BOOL},
}
LONGITUDINAL_COLUMNS: dict[str, dict] = {
    "subject": {"Description": "Subject label"},
    "lesion": {"Description": "Lesion id, stable across sessions, numbered by first appearance "
               "(ties by larger volume); equal to the voxel value of the track images"},
    "session": {"Description": "Session label"},
    "day": {"Description": "Days from the subject's first session", "Units": "day"},
    "volume_mm3": {"Description": "Sum of the lesion's component volumes; 0 when absent; n/a "
                   "when merged into another lesion", "Units": "mm^3"},
    "status": {"Description": "State of the lesion at the session", "Levels": {
        "new": "first seen at this session (not the subject's first session)",
        "present": "seen at this session",
        "absent": "not found at this session (volume 0)",
        "merged": "flowed into the lesion named in merged_into"}},
    "components": {"Description": "Number of components forming the lesion (more than 1 after "
                   "a split)", "Units": "1"},
    "merged_into": {"Description": "For a merged lesion: id of the lesion that holds it"},
    "merged_from": {"Description": "Comma-separated ids of lesions merged into this one; "
                    "per-lesion fits leave such rows out unless configured to fit the sum"},
    "corrected": {"Description": "A component of this row was assigned by a QA correction",
                  "Levels": _BOOL},
    "review": {"Description": "A link into this row is flagged for review", "Levels": _BOOL},
    "group": {"Description": "Group of the subject from the manifest ('' = none; fitted as "
              "'all')"},
}
ASSIGNMENT_COLUMNS: dict[str, dict] = {
    "subject": {"Description": "Subject label"},
    "session": {"Description": "Session label"},
    "component": {"Description": "Component number in lesions.tsv"},
    "lesion": {"Description": "Lesion id the component belongs to"},
    "corrected": {"Description": "Named in the corrections table", "Levels": _BOOL},
    "automatic_lesion": {"Description": "Lesion id of the automatic (uncorrected) result, the id "
                         "that corrections refer to"},
}
COLUMNS: dict[str, dict] = {"matches.tsv": MATCHES_COLUMNS,
                            "longitudinal.tsv": LONGITUDINAL_COLUMNS}
_RECENT = 1e-9      # cost per absent session: breaks exact ties only
_LESION_COLUMNS = ("subject", "session", "component", "volume_mm3", "centroid_x_mm",
                   "centroid_y_mm", "centroid_z_mm")


@dataclass(frozen=True)
class MatchResult:
    """What stage 2 returns for one subject (tables in the order of the sessions)."""

    matches: pd.DataFrame
    longitudinal: pd.DataFrame
    assignment: pd.DataFrame
    warnings: tuple[str, ...] = ()


def match_subject(scans: Sequence[LabelledScan], lesions: pd.DataFrame, *,
                  settings: MatchSettings = MatchSettings(),
                  corrections: pd.DataFrame | None = None,
                  transforms: Mapping[str, np.ndarray] | None = None,
                  corrections_source: str = "corrections table") -> MatchResult:
    """Match one subject's lesion components across sessions into lesion tracks.

    Parameters
    ----------
    scans : sequence of LabelledScan
        All sessions of one subject, in any order (sorted by day, then session).
    lesions : pandas.DataFrame
        ``lesions.tsv`` rows (other subjects' rows are ignored): ``subject``, ``session``,
        ``component``, ``volume_mm3``, ``centroid_x_mm``, ``centroid_y_mm``, ``centroid_z_mm``.
    settings : MatchSettings
    corrections : pandas.DataFrame, optional
        ``corrections.tsv`` rows (``subject session component lesion``); lesion ids refer to the
        automatic result, which is always computed first. Each correction pins its component
        in a second pass, so the sessions after it follow the corrected lesion.
    transforms : mapping of session -> (4, 4) ndarray, optional
        Maps each session's world (RAS+ mm) into the first session's world, e.g.
        ``pipeline.matching.registration.rigid_register(...).matrix_ras``; missing sessions:
        identity.
    corrections_source : str
        How messages about bad corrections name the table (the file as given).

    Returns
    -------
    MatchResult

    Examples
    --------
    >>> comp = np.ones((2, 2, 2), np.int32)
    >>> scans = [LabelledScan("01", s, d, comp, (3, 3, 3), (8, 8, 8), np.eye(4))
    ...          for s, d in (("2", 30.0), ("1", 0.0))]
    >>> rows = pd.DataFrame({"subject": "01", "session": ["1", "2"], "component": 1,
    ...                      "volume_mm3": 8.0, "centroid_x_mm": 3.5, "centroid_y_mm": 3.5,
    ...                      "centroid_z_mm": 3.5})
    >>> result = match_subject(scans, rows)
    >>> result.longitudinal[["lesion", "session", "status", "volume_mm3"]].values.tolist()
    [[1, '1', 'present', 8.0], [1, '2', 'present', 8.0]]
    >>> result.matches[["relation", "overlap"]].values.tolist()
    [['continues', 1.0]]
    """
    ordered = _ordered_scans(scans)
    subject = ordered[0].subject
    rows = _subject_rows(lesions, ordered)
    geoms = [scan_geometry(scan, rows[scan.session], to_reference=_transform(transforms, scan))
             for scan in ordered]
    step = _link_sessions(geoms, settings)
    volumes = {(i, c): v for i, g in enumerate(geoms) for c, v in g.volumes.items()}
    ids = number_lesions(step.membership, volumes)
    automatic = {key: ids[label] for key, label in step.membership.items()}
    membership, final, named = automatic, step, {}
    if corrections is not None and len(corrections):
        named = parse_corrections(corrections, subject=subject,
                                  sessions=[s.session for s in ordered],
                                  components=set(automatic), lesion_ids=set(ids.values()),
                                  source=corrections_source)
        # the corrections are pins of a second pass: later sessions follow the corrected lesions
        final = _link_sessions(geoms, settings, pins=correction_pins(named, automatic, step.links),
                               suggest=lambda key: ("auto", automatic[key]))
        numbers = number_lesions(final.membership, volumes)
        membership = {key: numbers[label] for key, label in final.membership.items()}
    links = sorted(mark_corrected(final.links, step.links, named, automatic),
                   key=lambda link: (link.dst, link.src))
    shifts = _session_shifts(geoms, links, settings)
    warnings = _warnings(ordered, shifts, step.unmatched, settings)
    matches = _matches_table(ordered, links, membership, final.pairs, shifts, settings,
                             revived=final.revived)
    longitudinal = _longitudinal_table(ordered, membership, volumes, links, named, matches)
    assignment = pd.DataFrame(
        [{"subject": subject, "session": ordered[key[0]].session, "component": key[1],
          "lesion": membership[key], "corrected": key in named,
          "automatic_lesion": automatic[key]} for key in sorted(membership)],
        columns=list(ASSIGNMENT_COLUMNS))
    return MatchResult(matches, longitudinal, assignment, tuple(warnings))


# ---- validation --------------------------------------------------------------------------------
def _ordered_scans(scans: Sequence[LabelledScan]) -> list[LabelledScan]:
    if not scans:
        raise ValueError("match_subject needs at least one scan")
    subjects = sorted({scan.subject for scan in scans})
    if len(subjects) > 1:
        raise ValueError(f"match_subject takes one subject's scans; got subjects {subjects}")
    sessions = [scan.session for scan in scans]
    duplicated = sorted({s for s in sessions if sessions.count(s) > 1})
    if duplicated:
        raise InputError(f"subject {subjects[0]}: session {duplicated[0]} is given twice",
                         subject=subjects[0], session=duplicated[0], stage="match")
    return sorted(scans, key=lambda scan: (float(scan.day), scan.session))


def _subject_rows(lesions: pd.DataFrame, scans: list[LabelledScan]) -> dict[str, pd.DataFrame]:
    missing = [c for c in _LESION_COLUMNS if c not in lesions.columns]
    if missing:
        raise ValueError(f"lesions table lacks columns {missing}")
    subject = scans[0].subject
    table = lesions[lesions["subject"].astype(str) == subject]
    by_session = dict(iter(table.groupby(table["session"].astype(str), sort=False)))
    out = {}
    for scan in scans:
        rows = by_session.get(scan.session, table.iloc[:0])
        listed = sorted(rows["component"].astype(int))
        found = sorted(int(c) for c in np.unique(scan.components) if c > 0)
        if listed != found:
            raise InputError(f"subject {subject} session {scan.session}: lesions.tsv lists "
                             f"components {listed} but the mask holds {found}; re-run volumes",
                             subject=subject, session=scan.session, stage="match")
        out[scan.session] = rows.assign(component=rows["component"].astype(int))
    return out


def _transform(transforms: Mapping[str, np.ndarray] | None, scan: LabelledScan) -> np.ndarray:
    if not transforms or scan.session not in transforms:
        return np.eye(4)
    matrix = np.asarray(transforms[scan.session], dtype=float)
    if matrix.shape != (4, 4) or not np.all(np.isfinite(matrix)) \
            or not np.allclose(matrix[3], [0, 0, 0, 1]):
        raise ValueError(f"subject {scan.subject} session {scan.session}: the transform must be "
                         f"a finite 4x4 affine with last row 0 0 0 1")
    return matrix


# ---- automatic linking -------------------------------------------------------------------------
@dataclass(frozen=True)
class _Step:
    membership: dict[CompKey, Hashable]
    links: list[Link]
    pairs: dict[tuple[CompKey, CompKey], Evidence]
    unmatched: list[tuple[int, int, int]]   # (session index, components, frontier components)
    revived: frozenset[CompKey] = frozenset()   # parts that took back a merged lesion's id


def _link_sessions(geoms: list[ScanGeometry], settings: MatchSettings, *,
                   pins: Mapping[CompKey, Hashable] | None = None,
                   suggest: Callable[[CompKey], Hashable] | None = None) -> _Step:
    """Links and lesion labels session by session; labels follow ``pipeline.matching.identity``."""
    book = LesionBook({(t, c): v for t, g in enumerate(geoms) for c, v in g.volumes.items()},
                      pins=pins, suggest=suggest)
    links: list[Link] = []
    pairs: dict[tuple[CompKey, CompKey], Evidence] = {}
    unmatched = []

    def evidence_of(src: CompKey, dst: CompKey) -> Evidence:
        return pairs.get((src, dst)) or pair_evidence(geoms[src[0]], src[1], geoms[dst[0]],
                                                      dst[1], settings=settings)

    for t, geom in enumerate(geoms):
        current = [(t, c) for c in sorted(geom.voxels)]
        frontier = book.frontier(t, max_gap=settings.max_gap)
        evidence = session_evidence(geoms, frontier, current, settings)   # candidates only
        pairs.update(evidence)
        new = _session_links(frontier, current, book.constrain(evidence), t)
        if not new and len(current) >= settings.misregistration_min_pairs \
                and len(frontier) >= settings.misregistration_min_pairs:
            unmatched.append((t, len(current), len(frontier)))
        links.extend(book.settle(t, current, new, evidence_of))
    return _Step(book.lesion_of, links, pairs, unmatched, frozenset(book.revived))


def _session_links(frontier: list[CompKey], current: list[CompKey],
                   evidence: Mapping[tuple[CompKey, CompKey], Evidence], t: int) -> list[Link]:
    if not frontier or not current:
        return []
    row_of = {f: i for i, f in enumerate(frontier)}
    col_of = {k: j for j, k in enumerate(current)}
    cost = {(row_of[f], col_of[k]): 1.0 - ev.score + _RECENT * (t - 1 - f[0])
            for (f, k), ev in evidence.items() if ev.candidate}   # exact ties: the more recent
    links = [Link(frontier[i], current[j], evidence[(frontier[i], current[j])], True)
             for i, j in sparse_assignment(len(frontier), len(current), cost)]
    touch_to: dict[CompKey, list[CompKey]] = defaultdict(list)     # in frontier order
    touch_from: dict[CompKey, list[CompKey]] = defaultdict(list)   # in current order
    for f, k in sorted((pair for pair, ev in evidence.items() if ev.touching),
                       key=lambda pair: (row_of[pair[0]], col_of[pair[1]])):
        touch_to[k].append(f)
        touch_from[f].append(k)
    assigned = {link.dst for link in links}
    for k in current:                                   # splits: unassigned, touching
        touching = [] if k in assigned else touch_to[k]
        if touching:
            f = max(touching, key=lambda f: (evidence[(f, k)].score, -f[1]))
            links.append(Link(f, k, evidence[(f, k)], False))
    linked = {link.src for link in links}
    for f in frontier:                                  # merges: previous session, touching
        touching = [k for k in touch_from[f] if f[0] == t - 1 and f not in linked]
        if touching:
            k = max(touching, key=lambda k: (evidence[(f, k)].score, -k[1]))
            links.append(Link(f, k, evidence[(f, k)], False))
    return links


# ---- misregistration ---------------------------------------------------------------------------
@dataclass(frozen=True)
class _Shift:
    vector: np.ndarray | None    # common shift relative to the first session (mm), None: unknown
    pairs: int
    flagged: bool


def _session_shifts(geoms: list[ScanGeometry], links: Sequence[Link],
                    settings: MatchSettings) -> list[_Shift]:
    """Median displacement of each session's assigned links, chained to the first session."""
    shifts = [_Shift(np.zeros(3), 0, False)]
    for t in range(1, len(geoms)):
        moves = []
        for link in links:
            if link.assigned and link.dst[0] == t:
                source = shifts[link.src[0]]
                base = source.vector if source.flagged else np.zeros(3)
                moves.append(geoms[t].centroids[link.dst[1]]
                             - geoms[link.src[0]].centroids[link.src[1]] + base)
        if len(moves) < settings.misregistration_min_pairs:
            shifts.append(_Shift(None, len(moves), False))
            continue
        offset = np.median(np.array(moves), axis=0)
        size = float(np.linalg.norm(offset))
        spread = float(np.median(np.linalg.norm(np.array(moves) - offset, axis=1)))
        flagged = size > settings.misregistration_mm and spread <= 0.5 * size
        shifts.append(_Shift(offset, len(moves), flagged))
    return shifts


def _warnings(ordered: list[LabelledScan], shifts: list[_Shift],
              unmatched: list[tuple[int, int, int]], settings: MatchSettings) -> list[str]:
    out = []
    subject = ordered[0].subject
    for t, shift in enumerate(shifts):
        if shift.flagged and shift.vector is not None:
            x, y, z = shift.vector
            size = float(np.linalg.norm(shift.vector))
            out.append(f"subject {subject} session {ordered[t].session}: its {shift.pairs} matched "
                       f"lesions share a shift of {size:.1f} mm (x {x:+.1f}, y {y:+.1f}, "
                       f"z {z:+.1f}) from the first session, more than "
                       f"{settings.misregistration_mm:g} mm; the scans may not share world space "
                       "(check the headers or enable registration)")
    for t, n_current, n_frontier in unmatched:
        out.append(f"subject {subject} session {ordered[t].session}: none of its {n_current} "
                   f"lesions matched any of the {n_frontier} earlier lesions; the scans may not "
                   "share world space (check the headers or enable registration)")
    return out


# ---- tables ------------------------------------------------------------------------------------
@dataclass(frozen=True)
class _PairIndex:
    """The candidate pairs by their earlier and by their later component, so that the review
    of a link looks only at the pairs sharing one of its ends."""

    by_src: dict[CompKey, list[tuple[CompKey, Evidence]]]
    by_dst: dict[CompKey, list[tuple[CompKey, Evidence]]]

    @classmethod
    def of(cls, pairs: Mapping[tuple[CompKey, CompKey], Evidence]) -> _PairIndex:
        by_src: dict[CompKey, list] = defaultdict(list)
        by_dst: dict[CompKey, list] = defaultdict(list)
        for (f, k), evidence in pairs.items():
            if evidence.candidate:
                by_src[f].append((k, evidence))
                by_dst[k].append((f, evidence))
        return cls(dict(by_src), dict(by_dst))


def _review(link: Link, membership: Mapping[CompKey, int], ends: _PairIndex, linked: set[tuple],
            flagged: bool, settings: MatchSettings) -> tuple[float, list[str]]:
    """Confidence and review reasons. A rival is a candidate pair that is not a link, shares an
    end with ``link`` and would have put that end into another lesion."""
    ev = link.evidence
    rivals = [e.score for k, e in ends.by_src.get(link.src, ()) if (link.src, k) not in linked
              and k != link.dst and k[0] == link.dst[0]
              and membership[k] != membership[link.dst]]
    rivals += [e.score for f, e in ends.by_dst.get(link.dst, ()) if (f, link.dst) not in linked
               and f != link.src and membership[f] != membership[link.src]]
    confidence = ev.score - max(rivals) if rivals else ev.score
    reasons = []
    if rivals and confidence < settings.ambiguity_margin:
        reasons.append("ambiguous")
    if ev.overlap < settings.review_min_overlap and not ev.centroid_inside:
        reasons.append("small-overlap")
    if link.assigned and ev.distance_ratio > settings.review_max_distance_ratio:
        reasons.append("large-jump")
    if link.dst[0] - link.src[0] > 1:
        reasons.append("reappeared")
    if flagged:
        reasons.append("misregistered")
    return float(np.clip(confidence, 0.0, 1.0)), [] if link.corrected else reasons


def _matches_table(ordered: list[LabelledScan], links: Sequence[Link],
                   membership: Mapping[CompKey, int],
                   pairs: Mapping[tuple[CompKey, CompKey], Evidence], shifts: list[_Shift],
                   settings: MatchSettings, *, revived: frozenset[CompKey] = frozenset()
                   ) -> pd.DataFrame:
    rows = []
    linked = {(link.src, link.dst) for link in links}
    ends = _PairIndex.of(pairs)
    for link, relation in zip(links, link_relations(links)):
        ev, shift = link.evidence, shifts[link.dst[0]]
        confidence, reasons = _review(link, membership, ends, linked, shift.flagged, settings)
        if link.dst in revived and not link.corrected:
            reasons = reasons + ["separated"]
        rows.append({
            "subject": ordered[0].subject, "session_from": ordered[link.src[0]].session,
            "component_from": link.src[1], "session_to": ordered[link.dst[0]].session,
            "component_to": link.dst[1], "relation": relation, "overlap": ev.overlap,
            "centroid_distance_mm": ev.centroid_distance_mm,
            "centroid_inside": ev.centroid_inside, "distance_ratio": ev.distance_ratio,
            "score": ev.score, "assigned": link.assigned, "confidence": confidence,
            "review": bool(reasons), "review_reason": ",".join(reasons),
            "gap": link.dst[0] - link.src[0] - 1, "lesion_from": membership[link.src],
            "lesion_to": membership[link.dst],
            "session_shift_mm": (float(np.linalg.norm(shift.vector))
                                 if shift.vector is not None else float("nan")),
            "misregistered": shift.flagged, "corrected": link.corrected})
    return pd.DataFrame(rows, columns=list(MATCHES_COLUMNS))


def _longitudinal_table(ordered: list[LabelledScan], membership: Mapping[CompKey, int],
                        volumes: Mapping[CompKey, float], links: Sequence[Link],
                        named: Mapping[CompKey, object], matches: pd.DataFrame) -> pd.DataFrame:
    corrected = {(membership[key], key[0]) for key in named}
    review = {(membership[link.dst], link.dst[0])
              for link, flag in zip(links, matches["review"]) if flag}
    rows = []
    for row in track_rows(len(ordered), membership, volumes, links):
        s = row.pop("session_index")
        scan = ordered[s]
        rows.append({"subject": scan.subject, "lesion": row["lesion"], "session": scan.session,
                     "day": float(scan.day), **{k: row[k] for k in (
                         "volume_mm3", "status", "components", "merged_into", "merged_from")},
                     "corrected": (row["lesion"], s) in corrected,
                     "review": (row["lesion"], s) in review})
    return pd.DataFrame(rows, columns=list(LONGITUDINAL_COLUMNS))
