"""Atomic file writes (no pandas here: stage-1 workers import this without it)."""
from __future__ import annotations

import os
import tempfile
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path


@contextmanager
def atomic_path(path: str | os.PathLike, *, durable: bool = True) -> Iterator[Path]:
    """Yield a temporary path beside ``path``; on success rename it over ``path`` atomically.

    ``durable`` flushes the data to disk (fsync) before the rename, so a power loss leaves the
    old file or the new one; a cache entry, which is only ever a miss when torn, skips that.

    The temporary name keeps the real suffix (``.nii.gz`` stays last), because nibabel picks
    the file format from the name. On failure the temporary file is removed and ``path`` is left
    as it was.
    """
    path = Path(path)
    path.parent.mkdir(parents=True, exist_ok=True)
    suffix = "".join(path.suffixes) or ".tmp"
    fd, tmp = tempfile.mkstemp(prefix=f".{path.name.split('.')[0]}.", suffix=suffix,
                               dir=path.parent)
    os.close(fd)
    os.chmod(tmp, 0o666 & ~_umask())   # mkstemp makes 0600; outputs get the usual mode
    tmp_path = Path(tmp)
    try:
        yield tmp_path
        if durable:
            with open(tmp_path, "rb") as handle:
                os.fsync(handle.fileno())
        os.replace(tmp_path, path)
    finally:
        if tmp_path.exists():
            tmp_path.unlink()


def _umask() -> int:
    mask = os.umask(0)
    os.umask(mask)
    return mask


def write_text(path: str | os.PathLike, text: str) -> None:
    """Write ``text`` (UTF-8) to ``path`` atomically."""
    with atomic_path(path) as tmp:
        tmp.write_text(text, encoding="utf-8")
