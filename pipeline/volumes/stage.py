"""Stage 1 as one function on in-memory masks: :func:`lesion_table` (the ``volumes`` command
without files). ``pipeline.api`` re-exports it; research use only (``pipeline.DISCLAIMER``)."""
from __future__ import annotations

from collections.abc import Iterable

import numpy as np
import pandas as pd

from pipeline.config import Config
from pipeline.volumes.components import LabelledScan, component_table, scan_table

#: (subject, session, day, mask array, voxel -> RAS+ mm affine)
ScanInput = tuple[str, str, float, np.ndarray, np.ndarray]


def lesion_table(scans: Iterable[ScanInput], *, config: Config = Config(),
                 labels: tuple[int, ...] | None = None, group: str = ""
                 ) -> tuple[pd.DataFrame, list[LabelledScan]]:
    """lesions.tsv rows and the labelled scans for ``(subject, session, day, mask, affine)`` items.

    ``mask`` is an (X, Y, Z) integer array (e.g. a model's output) and ``affine`` its voxel ->
    RAS+ mm matrix; ``day`` is days from any reference (each subject's first day becomes 0).
    """
    items = list(scans)
    first = {}
    for subject, _, day, _, _ in items:
        first[subject] = min(first.get(subject, day), day)
    parts, labelled = [], []
    for subject, session, day, mask, affine in items:
        day = float(day - first[subject])
        affine = np.asarray(affine, dtype=np.float64)
        table, components, offset = component_table(np.asarray(mask), affine, labels=labels,
                                                    settings=config.volumes)
        parts.append(scan_table(table, subject=subject, session=session, day=day, mask="",
                                group=group))
        labelled.append(LabelledScan(subject, session, day, components, offset,
                                     tuple(np.shape(mask)[:3]), affine))
    return pd.concat(parts, ignore_index=True), labelled
