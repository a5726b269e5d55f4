"""Lesion tracks from component links: ids, statuses, merges, QA corrections and track images.

A component is named by ``(session_index, component)`` (``CompKey``), sessions in time order.
A *membership* maps every component to a lesion label; *links* join components of different
sessions. Everything here follows the rules behind ``longitudinal.tsv`` in docs/outputs.md §4.5:

- ids: positive integers numbered by first appearance, ties by larger volume at that session
  (then by smaller component number), equal to the values of the track images;
- status: ``present`` at the first session and whenever found, ``new`` at a later first
  appearance, ``absent`` (volume 0) when not found, ``merged`` (volume n/a, ``merged_into``)
  while the lesion has flowed into another one, ``present`` again once it separates (see
  ``pipeline.matching.identity``); no rows before a lesion first appears;
- a lesion X is *merged* at session s into lesion Y when X has no component at s and a link
  runs from one of X's components into a component of Y at s (the survivor Y was chosen by the
  matcher as the parent larger at the previous session). The survivor lists the absorbed ids
  in ``merged_from`` while X is merged; chains (X into Y, later Y into Z) resolve to Z.
"""
from __future__ import annotations

from collections import Counter, defaultdict
from collections.abc import Hashable, Mapping, Sequence
from dataclasses import dataclass, replace

import numpy as np
import pandas as pd

from pipeline.errors import InputError
from pipeline.matching.overlap import Evidence
from pipeline.volumes.components import LabelledScan

CompKey = tuple[int, int]


@dataclass(frozen=True)
class Link:
    """A link between two components of different sessions (``src`` earlier than ``dst``)."""

    src: CompKey
    dst: CompKey
    evidence: Evidence
    assigned: bool          # chosen by the one-to-one optimal assignment
    corrected: bool = False  # added or changed by a QA correction


def link_relations(links: Sequence[Link]) -> list[str]:
    """``merges`` when the target has several incoming links, else ``splits`` when the source
    has several links into the target's session, else ``continues``.

    Examples
    --------
    >>> e = Evidence(1.0, 0.0, True, 0.0, 1.0, True)
    >>> link_relations([Link((0, 1), (1, 1), e, True), Link((0, 1), (1, 2), e, False),
    ...                 Link((0, 2), (1, 3), e, True)])
    ['splits', 'splits', 'continues']
    """
    incoming = Counter(link.dst for link in links)
    outgoing = Counter((link.src, link.dst[0]) for link in links)
    return ["merges" if incoming[link.dst] > 1
            else "splits" if outgoing[(link.src, link.dst[0])] > 1 else "continues"
            for link in links]


def number_lesions(membership: Mapping[CompKey, Hashable],
                   volumes: Mapping[CompKey, float]) -> dict[Hashable, int]:
    """Lesion ids 1..n (docs/outputs.md §4.5): by first session, then larger volume there, then
    smaller component.

    Examples
    --------
    >>> number_lesions({(0, 1): "a", (1, 1): "b", (1, 2): "c"},
    ...                {(0, 1): 5.0, (1, 1): 2.0, (1, 2): 9.0})
    {'a': 1, 'c': 2, 'b': 3}
    """
    first: dict[Hashable, tuple[int, float, int]] = {}
    for key in sorted(membership):
        label = membership[key]
        session, comp = key
        if label not in first:
            first[label] = (session, 0.0, comp)
        if first[label][0] == session:
            s, v, c = first[label]
            first[label] = (s, v + volumes[key], min(c, comp))
    order = sorted(first, key=lambda lab: (first[lab][0], -first[lab][1], first[lab][2]))
    return {label: number for number, label in enumerate(order, start=1)}


def track_rows(n_sessions: int, membership: Mapping[CompKey, int],
               volumes: Mapping[CompKey, float], links: Sequence[Link]) -> list[dict]:
    """One row per lesion (lesion id, docs/outputs.md §4.5) and session from its first appearance
    on.

    Rows carry ``lesion``, ``session_index``, ``volume_mm3``, ``status``, ``components``,
    ``merged_into`` and ``merged_from`` (text: an id, comma-separated ids, or '').

    Examples
    --------
    >>> e = Evidence(0.5, 1.0, True, 0.2, 0.7, True)
    >>> rows = track_rows(2, {(0, 1): 1, (0, 2): 2, (1, 1): 1}, {(0, 1): 9.0, (0, 2): 4.0,
    ...                   (1, 1): 15.0}, [Link((0, 1), (1, 1), e, True),
    ...                                  Link((0, 2), (1, 1), e, False)])
    >>> for r in rows:
    ...     print(r["lesion"], r["session_index"], r["status"], r["merged_into"] or "-",
    ...           r["merged_from"] or "-")
    1 0 present - -
    2 0 present - -
    1 1 present - 2
    2 1 merged 1 -
    """
    comps_at: dict[tuple[int, int], list[CompKey]] = defaultdict(list)
    for key in sorted(membership):
        comps_at[(membership[key], key[0])].append(key)
    first = {}
    for lesion, session in sorted(comps_at, key=lambda k: k[1]):
        first.setdefault(lesion, session)
    into: dict[int, int | None] = {lesion: None for lesion in first}
    rows = []
    for s in range(n_sessions):
        present = {lesion for (lesion, ss) in comps_at if ss == s}
        for lesion in present:
            into[lesion] = None
        _record_merges(s, present, first, into, membership, volumes, links, comps_at)
        rows.extend(_session_rows(s, sorted(k for k in first if first[k] <= s), present, into,
                                  first, volumes, comps_at))
    return rows


def _record_merges(s: int, present: set[int], first: Mapping[int, int],
                   into: dict[int, int | None], membership: Mapping[CompKey, int],
                   volumes: Mapping[CompKey, float], links: Sequence[Link],
                   comps_at: Mapping[tuple[int, int], list[CompKey]]) -> None:
    targets: dict[int, set[int]] = defaultdict(set)
    for link in links:
        if link.dst[0] != s:
            continue
        x, y = membership[link.src], membership[link.dst]
        if x != y and x not in present and first[x] < s and into[x] is None:
            targets[x].add(y)
    for x, ys in targets.items():
        into[x] = max(ys, key=lambda y: (sum(volumes[k] for k in comps_at[(y, s)]), -y))


def _resolve(lesion: int, into: Mapping[int, int | None], present: set[int]) -> int:
    seen = {lesion}
    target = into[lesion]
    while target is not None and target not in present and into[target] is not None \
            and into[target] not in seen:
        seen.add(target)
        target = into[target]
    return int(target) if target is not None else lesion


def _session_rows(s: int, lesions: list[int], present: set[int], into: Mapping[int, int | None],
                  first: Mapping[int, int], volumes: Mapping[CompKey, float],
                  comps_at: Mapping[tuple[int, int], list[CompKey]]) -> list[dict]:
    absorbed: dict[int, list[int]] = defaultdict(list)
    rows = {}
    for lesion in lesions:
        comps = comps_at.get((lesion, s), [])
        row = {"lesion": lesion, "session_index": s, "components": len(comps),
               "merged_into": "", "merged_from": ""}
        if comps:
            row.update(volume_mm3=float(sum(volumes[k] for k in comps)),
                       status="new" if first[lesion] == s and s > 0 else "present")
        elif into[lesion] is not None:
            survivor = _resolve(lesion, into, present)
            absorbed[survivor].append(lesion)
            row.update(volume_mm3=float("nan"), status="merged", merged_into=str(survivor))
        else:
            row.update(volume_mm3=0.0, status="absent")
        rows[lesion] = row
    for survivor, ids in absorbed.items():
        if survivor in rows:
            rows[survivor]["merged_from"] = ",".join(str(i) for i in sorted(ids))
    return [rows[lesion] for lesion in lesions]


# ---------------------------------------------------------------------------------------------
# QA corrections
# ---------------------------------------------------------------------------------------------
def parse_corrections(corrections: pd.DataFrame, *, subject: str, sessions: Sequence[str],
                      components: set[CompKey], lesion_ids: set[int],
                      source: str = "corrections table") -> dict[CompKey, int | str]:
    """Validate the ``corrections.tsv`` rows of one subject: component -> lesion id or ``new``.

    Rows of other subjects are ignored (the caller checks that every subject exists). Messages
    name ``source`` (the file as given) and the line, assuming the table's index counts data
    rows from 0 (as ``read_table``) below one header line.

    Examples
    --------
    >>> table = pd.DataFrame({"subject": ["01"], "session": ["2"], "component": ["1"],
    ...                       "lesion": ["new"]})
    >>> parse_corrections(table, subject="01", sessions=["1", "2"], components={(1, 1)},
    ...                   lesion_ids={1})
    {(1, 1): 'new'}
    """
    missing = {"subject", "session", "component", "lesion"} - set(corrections.columns)
    if missing:
        raise InputError(f"corrections table lacks columns {sorted(missing)}; expected "
                         "subject, session, component, lesion", stage="match")
    out: dict[CompKey, int | str] = {}
    for index, row in corrections.iterrows():
        if str(row["subject"]).strip() != subject:
            continue
        where = f"{source} line {index + 2 if isinstance(index, int) else index}"
        key = _correction_key(row, where, subject, sessions, components)
        value = _correction_value(row["lesion"], where, subject, lesion_ids)
        if out.get(key, value) != value:
            raise InputError(f"{where}: session {sessions[key[0]]} component {key[1]} is "
                             f"corrected twice with different lesions", subject=subject,
                             stage="match")
        out[key] = value
    return out


def _as_int(value: object) -> int | None:
    try:
        number = float(str(value).strip())
    except ValueError:
        return None
    return int(number) if number.is_integer() and number > 0 else None


def _correction_key(row: pd.Series, where: str, subject: str, sessions: Sequence[str],
                    components: set[CompKey]) -> CompKey:
    session = str(row["session"]).strip()
    if session not in sessions:
        raise InputError(f"{where}: subject {subject} has no session {session!r}",
                         subject=subject, stage="match")
    comp = _as_int(row["component"])
    key = (list(sessions).index(session), comp if comp is not None else -1)
    if key not in components:
        raise InputError(f"{where}: subject {subject} session {session} has no component "
                         f"{row['component']!r}", subject=subject, session=session, stage="match")
    return key


def _correction_value(value: object, where: str, subject: str, lesion_ids: set[int]) -> int | str:
    if str(value).strip().lower() == "new":
        return "new"
    lesion = _as_int(value)
    if lesion is None or lesion not in lesion_ids:
        raise InputError(f"{where}: subject {subject} has no lesion {value!r} in the automatic "
                         f"result (known: 1-{max(lesion_ids, default=0)}, or 'new')",
                         subject=subject, stage="match")
    return lesion


def mark_corrected(links: Sequence[Link], automatic_links: Sequence[Link],
                   named: Mapping[CompKey, int | str], automatic: Mapping[CompKey, int]
                   ) -> list[Link]:
    """``links`` with ``corrected`` set on those a QA correction added or changed.

    A link is corrected when the automatic result had no such link, or when one of its ends is
    named with a lesion other than its automatic one (``new`` always counts).

    Examples
    --------
    >>> e = Evidence(1.0, 0.0, True, 0.0, 1.0, True)
    >>> auto = [Link((0, 1), (1, 1), e, True), Link((1, 1), (2, 1), e, True)]
    >>> now = [Link((1, 1), (2, 1), e, True), Link((0, 1), (2, 2), e, False)]
    >>> [link.corrected for link in mark_corrected(now, auto, {(1, 1): "new"},
    ...                                            {(0, 1): 1, (1, 1): 1, (2, 1): 1, (2, 2): 2})]
    [True, True]
    >>> [link.corrected for link in mark_corrected(now[:1], auto, {(1, 1): 1}, {(1, 1): 1})]
    [False]
    """
    if not named:
        return list(links)
    before = {(link.src, link.dst) for link in automatic_links}
    changed = {key for key, value in named.items() if value == "new" or value != automatic[key]}
    return [replace(link, corrected=link.corrected or (link.src, link.dst) not in before
                    or link.src in changed or link.dst in changed) for link in links]


# ---------------------------------------------------------------------------------------------
# Track images
# ---------------------------------------------------------------------------------------------
def _track_dtype(max_id: int) -> np.dtype:
    for dtype in (np.uint8, np.int16, np.int32):
        if max_id <= np.iinfo(dtype).max:
            return np.dtype(dtype)
    raise ValueError(f"lesion id {max_id} does not fit a 32-bit track image")


def track_image(scan: LabelledScan, assignment: pd.DataFrame) -> np.ndarray:
    """Full-grid array whose voxels hold their lesion's id (0 background).

    The dtype is the smallest of uint8, int16, int32 that holds the largest id of the subject
    (never int64), so all track images of one subject share it.

    Examples
    --------
    >>> comp = np.array([[[1, 0, 2]]], np.int32)
    >>> scan = LabelledScan("01", "2", 5.0, comp, (1, 0, 0), (3, 1, 3), np.eye(4))
    >>> table = pd.DataFrame({"subject": ["01"] * 3, "session": ["1", "2", "2"],
    ...                       "component": [1, 1, 2], "lesion": [300, 4, 3]})
    >>> image = track_image(scan, table)
    >>> image.dtype.name, image[1].tolist()
    ('int16', [[4, 0, 3]])
    """
    return track_images([scan], assignment)[0]


def track_images(scans: Sequence[LabelledScan], assignment: pd.DataFrame) -> list[np.ndarray]:
    """``track_image`` of each scan (all of one subject), the table read once.

    Examples
    --------
    >>> comp = np.array([[[1, 0, 2]]], np.int32)
    >>> scans = [LabelledScan("01", s, 0.0, comp, (0, 0, 0), (1, 1, 3), np.eye(4))
    ...          for s in ("1", "2")]
    >>> table = pd.DataFrame({"subject": ["01"] * 4, "session": ["1", "1", "2", "2"],
    ...                       "component": [1, 2, 1, 2], "lesion": [1, 2, 1, 3]})
    >>> [image.ravel().tolist() for image in track_images(scans, table)]
    [[1, 0, 2], [1, 0, 3]]
    """
    if not scans:
        return []
    mine = assignment[assignment["subject"].astype(str).to_numpy() == scans[0].subject]
    dtype = _track_dtype(int(mine["lesion"].max()) if len(mine) else 0)
    sessions = mine["session"].astype(str).to_numpy()
    comps_all = mine["component"].astype(int).to_numpy()
    lesions_all = mine["lesion"].astype(int).to_numpy()
    out = []
    for scan in scans:
        at = sessions == scan.session
        out.append(_paint(scan, comps_all[at], lesions_all[at], dtype))
    return out


def _paint(scan: LabelledScan, components: np.ndarray, lesions: np.ndarray,
           dtype: np.dtype) -> np.ndarray:
    comps = scan.components
    n_comps = int(comps.max()) if comps.size else 0
    lookup = np.zeros(n_comps + 1, dtype=dtype)
    for comp, lesion in zip(components.tolist(), lesions.tolist()):
        if 1 <= comp <= n_comps:
            lookup[comp] = lesion
    counts = np.bincount(comps.ravel(), minlength=n_comps + 1) if comps.size else lookup
    missing = [int(c) + 1 for c in np.flatnonzero((lookup[1:] == 0) & (counts[1:] > 0))]
    if missing:
        raise ValueError(f"subject {scan.subject} session {scan.session}: components {missing} "
                         "have no lesion in the assignment table")
    image = np.zeros(scan.shape, dtype=dtype, order="F")   # the file's order
    if comps.size:
        i, j, k = scan.offset
        a, b, c = comps.shape
        image[i:i + a, j:j + b, k:k + c] = lookup[comps]
    return image
