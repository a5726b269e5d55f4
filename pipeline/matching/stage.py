"""Stage 2 as one function on in-memory tables: :func:`track_lesions` (the ``match`` command
without files), subject by subject through :func:`pipeline.matching.links.match_subject`, the
function the command's tasks call too. ``pipeline.api`` re-exports it."""
from __future__ import annotations

from collections.abc import Iterable

import pandas as pd

from pipeline.config import Config
from pipeline.matching.links import match_subject
from pipeline.volumes.components import LabelledScan


def track_lesions(lesions: pd.DataFrame, scans: Iterable[LabelledScan], *,
                  config: Config = Config(), corrections: pd.DataFrame | None = None
                  ) -> tuple[pd.DataFrame, pd.DataFrame, pd.DataFrame]:
    """matches, longitudinal and component -> lesion assignment for every subject."""
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
