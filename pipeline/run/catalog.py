"""Every table the tool writes in OUT, with the one column dictionary that describes it.

Each dictionary is owned by the stage that makes the table (``pipeline.volumes.columns``,
``pipeline.matching.links``, ``pipeline.growth.*``) or, for the tables the run layer makes
itself, by :mod:`pipeline.run.sidecars`. :func:`write_output` writes a table and its JSON
sidecar from the same dictionary, with the key columns of docs/outputs.md first, so the table,
its sidecar and the documentation cannot drift apart; ``tests/commands/test_tables.py`` checks
every table a run writes against it.
"""
from __future__ import annotations

import functools
from collections.abc import Mapping
from pathlib import Path

import pandas as pd

from pipeline.io.tsv import write_sidecar, write_table

Dictionary = Mapping[str, Mapping[str, object]]


@functools.cache
def tables() -> dict[str, Dictionary]:
    """File name in OUT -> column dictionary (column -> Description, Units, Levels).

    Built on first use, so that stage 1 alone does not import the later stages.
    """
    from pipeline.growth import evaluate, fit_table, group_fits, population_columns, response
    from pipeline.matching import links
    from pipeline.run import sidecars
    from pipeline.volumes import columns as volume_columns

    return {
        "lesions.tsv": volume_columns.LESIONS,
        "masks.tsv": sidecars.MASK_COLUMNS,
        "errors.tsv": sidecars.ERROR_COLUMNS,
        "matches.tsv": links.MATCHES_COLUMNS,
        "longitudinal.tsv": links.LONGITUDINAL_COLUMNS,
        "lesion_components.tsv": links.ASSIGNMENT_COLUMNS,
        "registration.tsv": sidecars.REGISTRATION_COLUMNS,
        "events.tsv": sidecars.EVENT_COLUMNS,
        "fits.tsv": fit_table.COLUMNS,
        "unfitted.tsv": fit_table.UNFITTED_COLUMNS,
        "group_fits.tsv": group_fits.COLUMNS,
        "response.tsv": response.COLUMNS,
        "response_subjects.tsv": response.SUMMARY_COLUMNS,
        "evaluation.tsv": evaluate.COLUMNS,
        "evaluation_thresholds.tsv": evaluate.THRESHOLD_COLUMNS,
        "population_fits.tsv": population_columns.FITS,
        "population_lesions.tsv": population_columns.LESIONS,
        "group_contrasts.tsv": population_columns.CONTRASTS,
        "backtest.tsv": population_columns.BACKTEST,
    }

#: The key columns of docs/outputs.md, first in their table in this order (the others follow
#: in the order the stage made them). A table not named here is written in dictionary order.
KEY_COLUMNS: dict[str, tuple[str, ...]] = {
    "matches.tsv": ("subject", "session_from", "component_from", "session_to", "component_to",
                    "relation", "overlap", "centroid_distance_mm"),
    "longitudinal.tsv": ("subject", "lesion", "session", "day", "volume_mm3", "status",
                         "components"),
    "fits.tsv": ("subject", "lesion", "phase", "model", "n_points", "day_start", "day_end",
                 "v0_mm3", "alpha", "beta", "beta_ci_low", "beta_ci_high", "aicc", "note"),
    "group_fits.tsv": ("group", "phase", "model", "n_lesions", "n_points", "beta",
                       "beta_ci_low", "beta_ci_high"),
    "unfitted.tsv": (),
    "evaluation.tsv": (),
}


def key_columns(name: str) -> tuple[str, ...]:
    """The columns that open table ``name`` (all of its dictionary unless named above).

    >>> key_columns("longitudinal.tsv")[:3]
    ('subject', 'lesion', 'session')
    >>> key_columns("masks.tsv")[-1]
    'track_image'
    """
    return KEY_COLUMNS[name] if name in KEY_COLUMNS else tuple(tables()[name])


def write_output(out: Path, name: str, table: pd.DataFrame) -> Path:
    """Write ``OUT/name`` (key columns first) and its sidecar from the catalog's dictionary."""
    path = Path(out) / name
    write_table(table, path, columns=key_columns(name))
    write_sidecar(path, tables()[name])
    return path


def empty(name: str) -> pd.DataFrame:
    """A table of ``name`` without rows (its key columns)."""
    return pd.DataFrame(columns=list(key_columns(name)))
