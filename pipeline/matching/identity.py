"""Lesion identities session by session: continuations, merges, separation after a merge, QA pins.

Stage 2 (``pipeline.matching``) finds the links of each session (one-to-one assignment, splits,
merges); :class:`LesionBook` turns them into lesion labels and keeps what the next session needs:

- a component with incoming links takes its parent's lesion (the parent larger at its last
  session when there are several); one without a link starts a lesion of its own;
- a lesion with a link into another lesion's component and no component of its own *merged*: it
  leaves the frontier and remembers its *last separate appearance* (its components at the last
  session it was seen on its own), as does the survivor (its components just before it first
  absorbed another lesion);
- separation: when a survivor holding merged lesions shows several components at a later session
  (or a component without a link appears that touches a merged lesion's last separate
  appearance), the parts are matched one-to-one (``scipy.optimize.linear_sum_assignment`` on
  ``1 - score``) to the survivor and the lesions merged into it, each represented by its last
  separate appearance (best score over its components there). The survivor may take only its own
  parts (any candidate pair); a merged lesion takes a part that touches (shares voxels with, or
  holds the centroid of, or has its centroid inside) its last separate appearance. The survivor
  keeps at least one part; parts left over stay as they were. A part that takes back a merged
  lesion's id is listed in ``revived``;
- pins (QA corrections): a pinned component takes its pinned label whatever the links; the
  caller forbids links into it from other lesions (:meth:`LesionBook.constrain`). A component
  whose lesion was seen before and that has no incoming link gets one from the best-scoring
  component of that lesion's last appearance (marked corrected when a pin caused it), so every
  component has an incoming link unless its lesion starts at that session.

Labels are any hashable values; without ``suggest`` new lesions are numbered 1, 2, ... in order
of birth. Research use only; see ``pipeline.DISCLAIMER``.
"""
from __future__ import annotations

import itertools
from collections import defaultdict
from collections.abc import Callable, Hashable, Mapping, Sequence
from dataclasses import replace

import numpy as np
from scipy.optimize import linear_sum_assignment

from pipeline.matching.overlap import Evidence
from pipeline.matching.tracks import CompKey, Link

EvidenceOf = Callable[[CompKey, CompKey], Evidence]
_BIG = 1e6


class LesionBook:
    """The lesion labels of one subject, built session by session (see the module docstring).

    Parameters
    ----------
    volumes : mapping of CompKey -> float
        Volume (mm3) of every component of the subject.
    pins : mapping of CompKey -> label, optional
        Components whose label is fixed (QA corrections).
    suggest : callable CompKey -> label, optional
        Label for a component that starts a lesion, used unless an unpinned component already
        carries it (then ``("born", key)``); default: consecutive integers.

    Examples
    --------
    >>> e = Evidence(0.9, 0.5, True, 0.1, 0.9, True)
    >>> book = LesionBook({(0, 1): 5.0, (1, 1): 6.0})
    >>> book.settle(0, [(0, 1)], [], lambda a, b: e)
    []
    >>> book.frontier(1, max_gap=2)
    [(0, 1)]
    >>> len(book.settle(1, [(1, 1)], [Link((0, 1), (1, 1), e, True)], lambda a, b: e))
    1
    >>> book.lesion_of
    {(0, 1): 1, (1, 1): 1}
    """

    def __init__(self, volumes: Mapping[CompKey, float], *,
                 pins: Mapping[CompKey, Hashable] | None = None,
                 suggest: Callable[[CompKey], Hashable] | None = None) -> None:
        self.volumes = volumes
        self.pins = dict(pins or {})
        self.suggest = suggest
        self.lesion_of: dict[CompKey, Hashable] = {}
        self.revived: set[CompKey] = set()
        self._ids = itertools.count(1)
        self._rank: dict[Hashable, int] = {}
        self._pin_only: set[Hashable] = set()
        self._pin_labels = set(self.pins.values())
        self._last_seen: dict[Hashable, int] = {}
        self._last_comps: dict[Hashable, list[CompKey]] = {}
        self._holder: dict[Hashable, Hashable] = {}
        self._separate: dict[Hashable, list[CompKey]] = {}

    # ---- what the next session is compared with ------------------------------------------
    def frontier(self, t: int, *, max_gap: int) -> list[CompKey]:
        """Components of every live lesion at its last session (absent at most ``max_gap``)."""
        return [key for lesion in sorted(self._last_seen, key=self._rank.__getitem__)
                if lesion not in self._holder and t - self._last_seen[lesion] - 1 <= max_gap
                for key in self._last_comps[lesion]]

    def constrain(self, evidence: Mapping[tuple[CompKey, CompKey], Evidence]
                  ) -> Mapping[tuple[CompKey, CompKey], Evidence]:
        """``evidence`` with pairs into a pinned component from another lesion made non-links."""
        if not self.pins:
            return evidence
        out = dict(evidence)
        for (f, k), ev in evidence.items():
            if k in self.pins and self.lesion_of[f] != self.pins[k]:
                out[(f, k)] = replace(ev, overlap=0.0, centroid_inside=False, candidate=False)
        return out

    # ---- one session ---------------------------------------------------------------------
    def settle(self, t: int, current: Sequence[CompKey], links: Sequence[Link],
               evidence_of: EvidenceOf) -> list[Link]:
        """Label session ``t``'s components from its links; returns the links, plus any added."""
        parents: dict[CompKey, set[Hashable]] = defaultdict(set)
        for link in links:
            parents[link.dst].add(self.lesion_of[link.src])
        born = []
        for key in current:
            if key in self.pins:
                label = self.pins[key]
                if label not in self._rank:
                    self._pin_only.add(label)
            elif parents[key]:
                label = max(parents[key], key=lambda lab: (self._last_volume(lab),
                                                           -self._rank[lab]))
            else:
                label = self._born(key)
                born.append(key)
            self._label(key, label)
        self._separate_parts(t, current, born, evidence_of)
        out = list(links) + self._missing_links(current, links, evidence_of)
        self._record_merges(t, current, links)
        for lesion in {self.lesion_of[key] for key in current}:
            self._last_seen[lesion] = t
            self._last_comps[lesion] = [key for key in current if self.lesion_of[key] == lesion]
            self._holder.pop(lesion, None)
        keep = set(self._holder) | set(self._holder.values())
        self._separate = {k: v for k, v in self._separate.items() if k in keep}
        return out

    def _label(self, key: CompKey, label: Hashable) -> None:
        self.lesion_of[key] = label
        self._rank.setdefault(label, len(self._rank))
        if key not in self.pins:
            self._pin_only.discard(label)

    def _born(self, key: CompKey) -> Hashable:
        if self.suggest is None:
            return next(self._ids)
        label = self.suggest(key)
        return label if label not in self._rank or label in self._pin_only else ("born", key)

    def _last_volume(self, lesion: Hashable) -> float:
        return sum(self.volumes[k] for k in self._last_comps.get(lesion, ()))

    def _resolve(self, lesion: Hashable) -> Hashable:
        seen = {lesion}
        while lesion in self._holder and self._holder[lesion] not in seen:
            lesion = self._holder[lesion]
            seen.add(lesion)
        return lesion

    def _record_merges(self, t: int, current: Sequence[CompKey], links: Sequence[Link]) -> None:
        present = {self.lesion_of[key] for key in current}
        into: dict[Hashable, set[Hashable]] = defaultdict(set)
        for link in links:
            source = self.lesion_of[link.src]
            if source not in present:
                into[source].add(self.lesion_of[link.dst])
        for source, targets in into.items():
            survivor = max(targets, key=lambda lab: (
                sum(self.volumes[k] for k in current if self.lesion_of[k] == lab),
                -self._rank[lab]))
            self._holder[source] = survivor
            self._separate.setdefault(source, list(self._last_comps[source]))
            if survivor in self._last_comps:
                self._separate.setdefault(survivor, list(self._last_comps[survivor]))

    def _missing_links(self, current: Sequence[CompKey], links: Sequence[Link],
                       evidence_of: EvidenceOf) -> list[Link]:
        linked = {link.dst for link in links}
        added = []
        for key in current:
            lesion = self.lesion_of[key]
            if key in linked or lesion not in self._last_comps:
                continue
            sources = self._separate.get(lesion) if lesion in self._holder else None
            sources = sources or self._last_comps[lesion]
            best = max(sources, key=lambda k: (evidence_of(k, key).score, -k[0], -k[1]))
            corrected = key in self.pins or lesion in self._pin_labels
            added.append(Link(best, key, evidence_of(best, key), assigned=False,
                              corrected=corrected))
        return added

    def _separate_parts(self, t: int, current: Sequence[CompKey], born: Sequence[CompKey],
                        evidence_of: EvidenceOf) -> None:
        groups: dict[Hashable, list[Hashable]] = defaultdict(list)
        present = {self.lesion_of[key] for key in current}
        for lesion in sorted(self._holder, key=self._rank.__getitem__):
            survivor = self._resolve(lesion)
            if survivor in present and lesion not in present:
                groups[survivor].append(lesion)
        for survivor, merged in groups.items():
            own = [k for k in current if self.lesion_of[k] == survivor and k not in self.pins]
            parts = own + [k for k in born if k not in own]
            if len(parts) < 2 or survivor not in self._separate:
                continue
            chosen = self._match_parts([survivor] + merged, parts, set(own), evidence_of)
            for part, lesion in chosen.items():
                self.lesion_of[part] = lesion
                self.revived.add(part)

    def _match_parts(self, parties: list[Hashable], parts: list[CompKey], own: set[CompKey],
                     evidence_of: EvidenceOf) -> dict[CompKey, Hashable]:
        """part -> merged lesion it separates back into (the survivor's parts are left out)."""
        cost = np.full((len(parties), len(parts)), _BIG)
        for (i, party), (j, part) in itertools.product(enumerate(parties), enumerate(parts)):
            scores = [evidence_of(c, part) for c in self._separate[party]]
            if i == 0:              # the survivor: its own parts, any candidate pair
                fits = [e.score for e in scores if e.candidate and part in own]
            else:                   # a merged lesion: parts touching its last separate look
                fits = [e.score for e in scores if e.touching]
            if fits:
                cost[i, j] = 1.0 - max(fits)
        rows, cols = linear_sum_assignment(cost)
        chosen = {parts[j]: (i, cost[i, j]) for i, j in zip(rows, cols) if cost[i, j] < _BIG}
        taken = [p for p in own if p in chosen and chosen[p][0] > 0]
        if taken and len(taken) == len(own):            # the survivor keeps one of its parts
            del chosen[min(taken, key=lambda p: (-chosen[p][1], p))]
        return {part: parties[i] for part, (i, _) in chosen.items() if i > 0}


def correction_pins(named: Mapping[CompKey, int | str], automatic: Mapping[CompKey, int],
                    links: Sequence[Link]) -> dict[CompKey, Hashable]:
    """Pins for :class:`LesionBook` from QA corrections (component -> lesion id or ``new``).

    A component named with an id of the automatic result is pinned to ``("auto", id)``; ``new``
    components are pinned to ``("new", first)``, components linked to each other in the automatic
    result sharing one label (so they stay one lesion).

    Examples
    --------
    >>> e = Evidence(0.9, 0.5, True, 0.1, 0.9, True)
    >>> correction_pins({(1, 1): "new", (2, 1): "new", (2, 2): 1},
    ...                 {(0, 1): 1, (1, 1): 1, (2, 1): 1, (2, 2): 2},
    ...                 [Link((1, 1), (2, 1), e, True)])
    {(1, 1): ('new', (1, 1)), (2, 1): ('new', (1, 1)), (2, 2): ('auto', 1)}
    """
    group = {key: key for key, value in named.items() if value == "new"}

    def root(key: CompKey) -> CompKey:
        while group[key] != key:
            key = group[key]
        return key

    for link in sorted(links, key=lambda link: (link.dst, link.src)):
        if link.src in group and link.dst in group:
            group[root(link.dst)] = root(link.src)
    return {key: ("new", root(key)) if value == "new" else ("auto", value)
            for key, value in sorted(named.items())}
