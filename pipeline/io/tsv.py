"""TSV tables as BIDS writes them: tab separated, header row, ``n/a`` for missing values.

Identifier columns are always read as text (a subject called ``NA`` or a session ``01`` survives),
every write is atomic (temporary file in the destination folder, then rename), and each table can
carry a JSON sidecar that describes its columns and units.
"""
from __future__ import annotations

import json
import os
import warnings
from collections.abc import Iterable, Mapping
from pathlib import Path

import numpy as np
import pandas as pd

from pipeline.io.atomic import atomic_path, write_text  # noqa: F401 - the writers live there

#: Columns that identify things and therefore stay text, whatever they look like.
ID_COLUMNS = ("subject", "session", "session_from", "session_to", "reference_session", "group",
              "event", "phase",
              "model", "relation", "status", "mask", "image", "path", "stage", "reason", "labels",
              "note", "merged_into", "merged_from", "outcome", "flag", "flags", "source", "value")

NA = "n/a"


def write_table(table: pd.DataFrame, path: str | os.PathLike, *,
                columns: Iterable[str] | None = None) -> None:
    """Write ``table`` as a BIDS-style TSV, atomically.

    ``columns`` fixes the order of the first columns (the key columns of docs/outputs.md); any
    other columns follow in their current order. Missing values are written ``n/a``; booleans
    as ``true``/``false``. A number that is not finite (``inf``, ``-inf``, ``nan``) is written
    ``n/a`` too, in every column, so no table ever holds ``inf`` or ``nan`` as text (the
    producing stage says why in its ``note``).

    Examples
    --------
    >>> import tempfile, pathlib
    >>> d = pathlib.Path(tempfile.mkdtemp())
    >>> write_table(pd.DataFrame({"subject": ["01"], "x": [None]}), d / "t.tsv")
    >>> (d / "t.tsv").read_text()
    'subject\\tx\\n01\\tn/a\\n'
    >>> write_table(pd.DataFrame({"v": [float("inf"), 2.5]}), d / "f.tsv")
    >>> (d / "f.tsv").read_text()
    'v\\nn/a\\n2.5\\n'
    """
    table = _ordered(table, columns)
    out = table.copy()
    for name in out.columns:
        if out[name].dtype == bool:
            out[name] = out[name].map({True: "true", False: "false"})
        elif pd.api.types.is_float_dtype(out[name].dtype):
            out[name] = out[name].where(np.isfinite(out[name].to_numpy(float, na_value=np.nan)))
        elif out[name].dtype == object or pd.api.types.is_string_dtype(out[name].dtype):
            out[name] = out[name].astype(object).map(_cell)
    with atomic_path(path) as tmp:
        out.to_csv(tmp, sep="\t", index=False, na_rep=NA, lineterminator="\n")


def _cell(value: object) -> object:
    if isinstance(value, bool):
        return "true" if value else "false"
    if isinstance(value, str) and value == "":
        return None          # written as n/a, as BIDS does for a missing value
    if isinstance(value, float | np.floating) and not np.isfinite(value):
        return None          # inf/nan in a mixed column: n/a as well
    return value


def _ordered(table: pd.DataFrame, columns: Iterable[str] | None) -> pd.DataFrame:
    if columns is None:
        return table
    first = [c for c in columns if c in table.columns]
    missing = [c for c in columns if c not in table.columns]
    if missing:
        raise KeyError(f"table lacks key columns {missing}")
    rest = [c for c in table.columns if c not in first]
    return table[first + rest]


def read_table(path: str | os.PathLike, *,
               text_columns: Iterable[str] = ID_COLUMNS) -> pd.DataFrame:
    """Read a TSV (or CSV, by suffix) with identifier columns kept as text.

    ``n/a`` and empty cells become missing values (NaN) in measurement columns and empty strings
    in identifier columns; ``true``/``false`` columns become booleans.

    Examples
    --------
    >>> import tempfile, pathlib
    >>> p = pathlib.Path(tempfile.mkdtemp()) / "t.tsv"
    >>> _ = p.write_text("subject\\tsession\\tday\\nNA\\t01\\tn/a\\n")
    >>> t = read_table(p)
    >>> (t.subject[0], t.session[0], bool(t.day.isna()[0]))
    ('NA', '01', True)
    """
    path = Path(path)
    sep = "," if path.suffix.lower() == ".csv" else "\t"
    with warnings.catch_warnings():   # rows ending with a tab (spreadsheet exports) are fine
        warnings.simplefilter("ignore", pd.errors.ParserWarning)
        raw = pd.read_csv(path, sep=sep, dtype=str, keep_default_na=False, na_filter=False,
                          index_col=False)
    raw.columns = [c.strip() for c in raw.columns]
    repeated = sorted({c for c in raw.columns if list(raw.columns).count(c) > 1})
    if repeated:   # e.g. two headers that differ only in spaces: which one is meant is unclear
        raise pd.errors.ParserError(f"column name(s) {repeated} appear more than once")
    text = set(text_columns)
    out = {}
    for name in raw.columns:
        column = raw[name].str.strip()
        if name in text:
            out[name] = column.where(column != NA, "")
        else:
            out[name] = _parse_column(column)
    return pd.DataFrame(out, columns=list(raw.columns))


def _parse_column(column: pd.Series) -> pd.Series:
    missing = column.isin([NA, ""])
    values = column[~missing]
    if len(values) and values.str.lower().isin(["true", "false"]).all():
        parsed = column.str.lower().map({"true": True, "false": False})
        return parsed if not missing.any() else parsed.astype(object).where(~missing, None)
    numbers = pd.to_numeric(values, errors="coerce")
    if len(values) == 0 or numbers.notna().all():
        result = pd.Series(float("nan"), index=column.index)
        result[~missing] = numbers.astype(float)
        if len(values) and not missing.any() and (numbers == numbers.round()).all() \
                and values.str.fullmatch(r"[+-]?\d+").all():
            return result.astype("int64")
        return result
    return column.where(~missing, None)


def write_sidecar(path: str | os.PathLike, columns: Mapping[str, Mapping[str, object]]) -> None:
    """Write the BIDS JSON data dictionary for the TSV at ``path`` (same name, ``.json``)."""
    path = Path(path)
    write_text(path.with_suffix(".json"), json.dumps(dict(columns), indent=2) + "\n")
