"""Which pairs of components can be candidate links, found with a spatial index, not by trying all.

Stage 2 compares each session's components with the frontier of earlier components. Scoring a
pair (``pipeline.matching.overlap.pair_evidence``) costs a world-space Dice when the boxes meet,
and with
thousands of components trying every pair grows with the product of the counts. Only candidate
pairs matter (non-candidates never become links, rivals or costs below the gate), so each
component gets a *reach* in the reference world:

``reach = max(box_reach, min(max_distance_mm, max_distance_ratio * max(radius, min_radius_mm)))``

where ``box_reach`` is the distance from its centroid to the farthest corner of its world
bounding box. A candidate pair always has ``centroid distance <= reach_a + reach_b``:

- if it passes the gate by overlap or a centroid inside the other, the world boxes meet (the
  evidence is only computed then); both centroids lie in their boxes (a centroid lies in the
  convex hull of the voxel centres), so the distance is at most the two box reaches;
- if it passes by distance, ``d <= min(max_distance_mm, max_distance_ratio * max(r_a, r_b,
  min_radius_mm))``, which is one of the two distance reaches.

The pairs within that bound are found with ``scipy.spatial.cKDTree`` ball queries (each point with
twice its own reach, from both sides, then the exact bound), so the work grows with the number of
close pairs, not with the product of the counts. ``sparse_assignment`` then solves the optimal
one-to-one assignment on the candidate graph one connected part at a time.

Research use only; see ``pipeline.DISCLAIMER``.
"""
from __future__ import annotations

from collections.abc import Mapping, Sequence

import numpy as np
from scipy.optimize import linear_sum_assignment
from scipy.sparse import coo_matrix
from scipy.sparse.csgraph import connected_components
from scipy.spatial import cKDTree

from pipeline.matching.overlap import Evidence, ScanGeometry, pair_evidence
from pipeline.settings import MatchSettings

CompKey = tuple[int, int]
#: the bound is widened by this much (relative and mm) so rounding never drops a pair
_SLACK = 1e-9
_SLACK_MM = 1e-6
#: problems with at most this many cells are solved as one dense matrix
DENSE_CELLS = 250_000
BIG = 1e6   # cost of a forbidden pair in a dense assignment matrix


def reach_mm(geometry: ScanGeometry, component: int, settings: MatchSettings) -> float:
    """The reach (mm) of one component: see the module docstring.

    Examples
    --------
    >>> import pandas as pd
    >>> from pipeline.matching.overlap import scan_geometry
    >>> from pipeline.volumes.components import LabelledScan
    >>> cube = np.ones((2, 2, 2), np.int32)
    >>> rows = pd.DataFrame({"component": [1], "volume_mm3": [8.0], "centroid_x_mm": [1.5],
    ...                      "centroid_y_mm": [1.5], "centroid_z_mm": [1.5]})
    >>> g = scan_geometry(LabelledScan("s", "1", 0, cube, (1, 1, 1), (4,) * 3, np.eye(4)), rows)
    >>> reach_mm(g, 1, MatchSettings())   # 1.5 * min_radius_mm beats the box's 1.73 mm
    3.0
    """
    lo, hi = geometry.ref_boxes[component]
    centre = geometry.centroids[component]
    box = float(np.linalg.norm(np.maximum(np.abs(lo - centre), np.abs(hi - centre))))
    near = min(settings.max_distance_mm,
               settings.max_distance_ratio * max(geometry.radii[component],
                                                 settings.min_radius_mm))
    return max(box, near)


def close_pairs(points_a: np.ndarray, reach_a: np.ndarray, points_b: np.ndarray,
                reach_b: np.ndarray) -> np.ndarray:
    """Index pairs ``(i, j)`` with ``|a_i - b_j| <= reach_a[i] + reach_b[j]`` (plus a rounding
    slack), sorted; an (n, 2) integer array.

    Examples
    --------
    >>> a = np.array([[0.0, 0, 0], [10, 0, 0]])
    >>> b = np.array([[1.0, 0, 0], [30, 0, 0]])
    >>> close_pairs(a, np.array([0.5, 5.0]), b, np.array([0.5, 15.0])).tolist()
    [[0, 0], [1, 1]]
    """
    a, b = np.asarray(points_a, float).reshape(-1, 3), np.asarray(points_b, float).reshape(-1, 3)
    ra, rb = np.asarray(reach_a, float), np.asarray(reach_b, float)
    if not len(a) or not len(b):
        return np.zeros((0, 2), dtype=np.int64)
    found = []
    for points, reach, other, swap in ((a, ra, b, False), (b, rb, a, True)):
        tree = cKDTree(other)
        hits = tree.query_ball_point(points, r=2 * reach * (1 + _SLACK) + _SLACK_MM)
        sizes = np.fromiter((len(h) for h in hits), np.int64, len(hits))
        rows = np.repeat(np.arange(len(points)), sizes)
        cols = np.fromiter((j for h in hits for j in h), np.int64, int(sizes.sum()))
        found.append(np.stack([cols, rows] if swap else [rows, cols], axis=1))
    pairs = np.unique(np.concatenate(found), axis=0)
    gap = np.linalg.norm(a[pairs[:, 0]] - b[pairs[:, 1]], axis=1)
    keep = gap <= (ra[pairs[:, 0]] + rb[pairs[:, 1]]) * (1 + _SLACK) + _SLACK_MM
    return pairs[keep].reshape(-1, 2)


def session_evidence(geoms: Sequence[ScanGeometry], frontier: Sequence[CompKey],
                     current: Sequence[CompKey], settings: MatchSettings
                     ) -> dict[tuple[CompKey, CompKey], Evidence]:
    """The evidence of every candidate pair (frontier component, current component), in frontier
    then current order; pairs that fail the gate are left out.

    Pairs within the reach bound are screened first, all at once: a pair whose world boxes do
    not meet and that is too far by both distance gates (with a rounding slack) cannot be a
    candidate, so only the others are scored by ``pair_evidence``, which decides exactly."""
    if not frontier or not current:
        return {}
    a, b = _arrays(geoms, frontier, settings), _arrays(geoms, current, settings)
    pairs = close_pairs(a["centroid"], a["reach"], b["centroid"], b["reach"])
    i, j = pairs[:, 0], pairs[:, 1]
    gap = np.linalg.norm(a["centroid"][i] - b["centroid"][j], axis=1)
    radius = np.maximum(np.maximum(a["radius"][i], b["radius"][j]), settings.min_radius_mm)
    loose = 1 + 1e-7
    near = (gap <= settings.max_distance_mm * loose + _SLACK_MM) \
        & (gap <= settings.max_distance_ratio * radius * loose + _SLACK_MM)
    meet = np.all((a["lo"][i] <= b["hi"][j]) & (b["lo"][j] <= a["hi"][i]), axis=1)
    out = {}
    for m, n in pairs[near | meet].tolist():
        f, k = frontier[m], current[n]
        evidence = pair_evidence(geoms[f[0]], f[1], geoms[k[0]], k[1], settings=settings)
        if evidence.candidate:
            out[(f, k)] = evidence
    return out


def _arrays(geoms: Sequence[ScanGeometry], keys: Sequence[CompKey],
            settings: MatchSettings) -> dict[str, np.ndarray]:
    return {"centroid": np.array([geoms[s].centroids[c] for s, c in keys], float),
            "reach": np.array([reach_mm(geoms[s], c, settings) for s, c in keys], float),
            "radius": np.array([geoms[s].radii[c] for s, c in keys], float),
            "lo": np.array([geoms[s].ref_boxes[c][0] for s, c in keys], float),
            "hi": np.array([geoms[s].ref_boxes[c][1] for s, c in keys], float)}


def sparse_assignment(n_rows: int, n_cols: int, costs: Mapping[tuple[int, int], float]
                      ) -> list[tuple[int, int]]:
    """The optimal one-to-one assignment over the allowed pairs ``costs`` ((row, col) -> cost,
    each cost below 1): as many pairs as possible, then the least total cost, as
    ``linear_sum_assignment`` finds on the dense matrix with forbidden cells at ``BIG`` (dropped
    afterwards). Small problems are that dense matrix; larger ones are solved one connected part
    of the candidate graph at a time (the optimum splits over the parts). Pairs sorted by row.

    Examples
    --------
    >>> sparse_assignment(2, 2, {(0, 0): 0.5, (0, 1): 0.1, (1, 1): 0.2})
    [(0, 0), (1, 1)]
    """
    if not costs:
        return []
    if n_rows * n_cols <= DENSE_CELLS:
        return _dense(np.arange(n_rows), np.arange(n_cols), costs)
    keys = np.array(list(costs), dtype=np.int64)
    graph = coo_matrix((np.ones(len(keys)), (keys[:, 0], n_rows + keys[:, 1])),
                       shape=(n_rows + n_cols,) * 2)
    _, part = connected_components(graph, directed=False)
    parts: dict[int, dict[tuple[int, int], float]] = {}
    for (r, c), cost in costs.items():
        parts.setdefault(int(part[r]), {})[(r, c)] = cost
    out = []
    for mine in parts.values():
        if len(mine) == 1:
            out.extend(mine)
            continue
        rows = np.array(sorted({r for r, _ in mine}))
        cols = np.array(sorted({c for _, c in mine}))
        out.extend(_dense(rows, cols, mine))
    return sorted(out)


def _dense(rows: np.ndarray, cols: np.ndarray, costs: Mapping[tuple[int, int], float]
           ) -> list[tuple[int, int]]:
    matrix = np.full((len(rows), len(cols)), BIG)
    at_row = {int(r): i for i, r in enumerate(rows)}
    at_col = {int(c): j for j, c in enumerate(cols)}
    for (r, c), cost in costs.items():
        matrix[at_row[r], at_col[c]] = cost
    chosen_rows, chosen_cols = linear_sum_assignment(matrix)
    return [(int(rows[i]), int(cols[j])) for i, j in zip(chosen_rows, chosen_cols)
            if matrix[i, j] < BIG]
