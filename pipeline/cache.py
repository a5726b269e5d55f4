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

from pipeline.files import atomic_path


def cache_key(sha256: str, settings_digest: str, labels: tuple[int, ...] | None) -> str:
    """File name stem for one scan's cached result."""
    extra = hashlib.sha256(f"{settings_digest}|{labels}".encode()).hexdigest()[:16]
    return f"{sha256[:32]}-{extra}"


PATH_MARK = "\x00path\x00"


def save_result(folder: Path, key: str, result, mask_path: str) -> None:
    """Store a successful ``ScanResult`` atomically (workers may write their own entries).

    The table is kept column by column in its own dtypes (no text round trip), and the mask's
    path is taken out of warnings: the same content may come back under another name.
    """
    buffer = io.BytesIO()
    columns = {f"col_{name}": np.asarray(values) for name, values in result.columns.items()}
    warnings = [w.replace(mask_path, PATH_MARK) for w in result.warnings]
    from pipeline.batch import SparseImage

    sparse = result.components if isinstance(result.components, SparseImage) else \
        SparseImage.of(result.components)
    np.savez(buffer, **columns, run_starts=sparse.starts, run_lengths=sparse.lengths,
             run_values=sparse.values,
             image_shape=np.asarray(sparse.shape), image_dtype=np.asarray(sparse.dtype),
             image_order=np.asarray(sparse.order), offset=np.asarray(result.offset),
             shape=np.asarray(result.shape), affine=result.affine,
             file_affine=result.file_affine, units_code=np.asarray(result.units_code),
             forms=np.full((2, 4, 4), np.nan) if result.forms is None else result.forms,
             form_codes=np.asarray(result.form_codes),
             columns=np.asarray(list(result.columns)),
             warnings=np.asarray(json.dumps(warnings)),
             sha256=np.asarray(result.sha256))
    with atomic_path(folder / f"{key}.npz") as tmp:
        tmp.write_bytes(buffer.getvalue())


def load_result(folder: Path, key: str, subject: str, session: str, mask_path: str):
    """The cached ``ScanResult`` for ``key``, or None when there is none (or it is unreadable)."""
    from pipeline.batch import ScanResult, SparseImage
    from pipeline.volumes import MEASURE_COLUMNS

    path = folder / f"{key}.npz"
    if not path.exists():
        return None
    try:
        with np.load(path, allow_pickle=False) as data:
            columns = {name: data[f"col_{name}"] for name in MEASURE_COLUMNS}
            warnings = [w.replace(PATH_MARK, mask_path) for w in json.loads(str(data["warnings"]))]
            image = SparseImage(tuple(int(v) for v in data["image_shape"]),
                                str(data["image_dtype"]), str(data["image_order"]),
                                data["run_starts"], data["run_lengths"], data["run_values"])
            return ScanResult(subject, session, columns=columns, components=image,
                              offset=tuple(int(v) for v in data["offset"]),
                              shape=tuple(int(v) for v in data["shape"]),
                              affine=data["affine"], file_affine=data["file_affine"],
                              forms=data["forms"],
                              form_codes=tuple(int(c) for c in data["form_codes"]),
                              units_code=int(data["units_code"]),
                              sha256=str(data["sha256"]),
                              warnings=tuple(warnings), cached=True)
    except (OSError, ValueError, KeyError):
        return None
