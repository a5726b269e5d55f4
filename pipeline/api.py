"""The stages as Python functions on in-memory arrays and tables, for chaining after a model.

Each function mirrors a command: :func:`lesion_table` is ``volumes``, :func:`track_lesions` is
``match``, :func:`fit_growth` is ``fit``. Nothing here reads or writes files. Research use only;
see ``pipeline.DISCLAIMER``.

Examples
--------
>>> import numpy as np
>>> def mask(r):
...     m = np.zeros((30, 30, 30), np.uint8); m[15 - r:15 + r, 15 - r:15 + r, 15 - r:15 + r] = 1
...     return m
>>> scans = [("P1", str(s), day, mask(r), np.eye(4))
...          for s, (day, r) in enumerate([(0, 3), (30, 4), (60, 5), (90, 6)], start=1)]
>>> lesions, labelled = lesion_table(scans)
>>> lesions.volume_mm3.tolist()
[216.0, 512.0, 1000.0, 1728.0]
>>> matches, longitudinal, assignment = track_lesions(lesions, labelled)
>>> longitudinal.lesion.tolist(), longitudinal.status.tolist()
([1, 1, 1, 1], ['present', 'present', 'present', 'present'])
>>> fits, group_fits, unfitted = fit_growth(longitudinal)
>>> sorted(fits.model.unique().tolist())
['exponential', 'gompertz', 'logistic', 'power', 'surface']
"""
from __future__ import annotations

from collections.abc import Iterable

import numpy as np
import pandas as pd

from pipeline.config import Config
from pipeline.growth.fit_table import UNFITTED_COLUMNS
from pipeline.volumes.components import LabelledScan, component_table, scan_table

ScanInput = tuple[str, str, float, np.ndarray, np.ndarray]


def lesion_table(scans: Iterable[ScanInput], *, config: Config = Config(),
                 labels: tuple[int, ...] | None = None, group: str = ""
                 ) -> tuple[pd.DataFrame, list[LabelledScan]]:
    """lesions.tsv rows and the labelled scans for ``(subject, session, day, mask, affine)`` items.

    ``mask`` is an (X, Y, Z) integer array (e.g. a model's output) and ``affine`` its voxel ->
    RAS+ mm matrix; ``day`` is days from any reference (each subject's first day becomes 0).
    """
    settings = config.volumes
    items = list(scans)
    first = {}
    for subject, _, day, _, _ in items:
        first[subject] = min(first.get(subject, day), day)
    parts, labelled = [], []
    for subject, session, day, mask, affine in items:
        day = float(day - first[subject])
        affine = np.asarray(affine, dtype=np.float64)
        table, components, offset = component_table(
            np.asarray(mask), affine, labels=labels, connectivity=settings.connectivity,
            min_volume_mm3=settings.min_volume_mm3,
            measurable_min_diameter_mm=settings.measurable_min_diameter_mm,
            measurable_min_slices=settings.measurable_min_slices)
        parts.append(scan_table(table, subject=subject, session=session, day=day, mask="",
                                group=group))
        labelled.append(LabelledScan(subject, session, day, components, offset,
                                     tuple(np.shape(mask)[:3]), affine))
    return pd.concat(parts, ignore_index=True), labelled


def track_lesions(lesions: pd.DataFrame, scans: Iterable[LabelledScan], *,
                  config: Config = Config(), corrections: pd.DataFrame | None = None
                  ) -> tuple[pd.DataFrame, pd.DataFrame, pd.DataFrame]:
    """matches, longitudinal and component -> lesion assignment for every subject."""
    from pipeline.matching.links import match_subject

    scans = list(scans)
    out: dict[str, list[pd.DataFrame]] = {"m": [], "l": [], "a": []}
    for subject in sorted({s.subject for s in scans}):
        mine = None if corrections is None else corrections[corrections.subject == subject]
        result = match_subject([s for s in scans if s.subject == subject],
                               lesions[lesions.subject == subject], settings=config.matching,
                               corrections=mine)
        longitudinal = result.longitudinal.copy()
        groups = lesions.loc[lesions.subject == subject, "group"]
        longitudinal["group"] = groups.iloc[0] if len(groups) else ""
        out["m"].append(result.matches)
        out["l"].append(longitudinal)
        out["a"].append(result.assignment)
    return tuple(pd.concat(out[k], ignore_index=True) for k in "mla")  # type: ignore[return-value]


def fit_growth(longitudinal: pd.DataFrame, events: pd.DataFrame | None = None, *,
               config: Config = Config()
               ) -> tuple[pd.DataFrame, pd.DataFrame, pd.DataFrame]:
    """fits.tsv, group_fits.tsv and unfitted.tsv rows; ``events`` has subject, day, event[,
    lesion]. A lesion phase where no law could be fitted (fewer sessions than any law has
    parameters) has no row in fits.tsv (docs/outputs.md §4.7) but one in ``unfitted`` saying why."""
    from pipeline.growth import group_fits as groupfit
    from pipeline.growth import lesion_fits as growth
    from pipeline.growth import phases
    from pipeline.growth.response_fits import add_windows

    table = longitudinal if "group" in longitudinal.columns else \
        longitudinal.assign(group="")
    phased = phases.assign_phases(table, events, settings=config.fitting)
    fits = add_windows(growth.fit_lesions(phased, settings=config.fitting), phased,
                       settings=config.fitting)       # + response laws over whole phases
    none = fits["model"] == "none"
    unfitted = fits.loc[none, [c for c in UNFITTED_COLUMNS if c in fits.columns]]
    return (fits[~none].reset_index(drop=True),
            groupfit.fit_groups(phased, settings=config.fitting),
            unfitted.reset_index(drop=True))
