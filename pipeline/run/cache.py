"""Per-scan stage-1 results kept under ``OUT/.cache`` so a rerun recomputes only what changed.

The key is the SHA-256 of the mask file's bytes plus a digest of everything that changes the
result (tool version, volume settings, selected labels); never a path or a modification time.
"""
from __future__ import annotations

import hashlib
import io
import json
from pathlib import Path

import numpy as np

from pipeline.io.atomic import atomic_path


def cache_key(sha256: str, settings_digest: str, labels: tuple[int, ...] | None) -> str:
    """File name stem for one scan's cached result."""
    from pipeline.volumes.components import MEASURE_COLUMNS

    # the measured columns belong to the key: a release that adds one never reuses old entries
    extra = hashlib.sha256(f"{settings_digest}|{labels}|{MEASURE_COLUMNS}".encode()
                           ).hexdigest()[:16]
    return f"{sha256[:32]}-{extra}"


PATH_MARK = "\x00path\x00"


def save_result(folder: Path, key: str, result, mask_path: str) -> None:
    """Store a successful ``ScanResult`` atomically (workers may write their own entries).

    Few entries, so writing costs little next to measuring: the table as one structured array
    (each column in its own dtype, no text round trip), the component image's runs, the three
    geometry matrices in one array and the rest as JSON. The mask's path is taken out of
    warnings: the same content may come back under another name. Not flushed to disk with
    fsync: a torn entry after a power loss is only a cache miss.
    """
    from pipeline.run.results import SparseImage

    buffer = io.BytesIO()
    names = list(result.columns)
    rows = np.empty(len(result.columns[names[0]]),
                    dtype=[(name, np.asarray(result.columns[name]).dtype) for name in names])
    for name in names:
        rows[name] = result.columns[name]
    sparse = result.components if isinstance(result.components, SparseImage) else \
        SparseImage.of(result.components)
    geometry = np.full((4, 4, 4), np.nan)
    geometry[0] = result.affine
    if result.file_affine is not None:
        geometry[1] = result.file_affine
    if result.forms is not None:
        geometry[2:] = result.forms
    meta = {"image_shape": list(sparse.shape), "image_dtype": sparse.dtype,
            "image_order": sparse.order, "offset": list(result.offset),
            "shape": list(result.shape), "units_code": int(result.units_code),
            "form_codes": [int(c) for c in result.form_codes],
            "file_affine": result.file_affine is not None, "forms": result.forms is not None,
            "warnings": [w.replace(mask_path, PATH_MARK) for w in result.warnings],
            "sha256": result.sha256}
    np.savez(buffer, rows=rows, run_starts=sparse.starts, run_lengths=sparse.lengths,
             run_values=sparse.values, geometry=geometry, meta=np.asarray(json.dumps(meta)))
    with atomic_path(folder / f"{key}.npz", durable=False) as tmp:
        tmp.write_bytes(buffer.getvalue())


def load_result(folder: Path, key: str, subject: str, session: str, mask_path: str):
    """The cached ``ScanResult`` for ``key``, or None when there is none or it cannot be used
    (unreadable, torn, or written by another layout): then the scan is measured again."""
    from pipeline.run.results import ScanResult, SparseImage
    from pipeline.volumes.components import MEASURE_COLUMNS

    path = folder / f"{key}.npz"
    if not path.exists():
        return None
    try:
        with np.load(path, allow_pickle=False) as data:
            rows, geometry = data["rows"], data["geometry"]
            meta = json.loads(str(data["meta"]))
            columns = {name: np.ascontiguousarray(rows[name]) for name in MEASURE_COLUMNS}
            image = SparseImage(tuple(meta["image_shape"]), meta["image_dtype"],
                                meta["image_order"], data["run_starts"], data["run_lengths"],
                                data["run_values"])
            return ScanResult(subject, session, columns=columns, components=image,
                              offset=tuple(meta["offset"]), shape=tuple(meta["shape"]),
                              affine=geometry[0].copy(),
                              file_affine=geometry[1].copy() if meta["file_affine"] else None,
                              forms=geometry[2:].copy() if meta["forms"] else None,
                              form_codes=tuple(meta["form_codes"]),
                              units_code=int(meta["units_code"]), sha256=meta["sha256"],
                              warnings=tuple(w.replace(PATH_MARK, mask_path)
                                             for w in meta["warnings"]), cached=True)
    except Exception:  # noqa: BLE001 - any unusable entry is a miss, never a failed scan
        return None
