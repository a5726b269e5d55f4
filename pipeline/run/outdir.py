"""Is OUT a folder this command can write in? Asked before any work, so that an output folder
problem is one line and exit status 2 (a usage error) with nothing written, never a traceback."""
from __future__ import annotations

import os
import tempfile
from pathlib import Path

from pipeline.errors import UsageError


def check_out(out: str | os.PathLike, *, earlier_run: bool = False) -> None:
    """Raise :class:`UsageError` unless ``out`` is, or can be made, a folder we can write in.

    ``earlier_run``: the command works on the outputs of an earlier run (``match``, ``fit``,
    ``report``, ``evaluate``), so the folder must exist. Folders made to try writing are removed
    again: a failed check leaves nothing behind, and a passed one changes nothing.

    >>> import tempfile
    >>> with tempfile.TemporaryDirectory() as folder:
    ...     check_out(Path(folder) / "new" / "out")
    ...     sorted(Path(folder).iterdir())
    []
    >>> try:
    ...     check_out("/dev/null/out")
    ... except UsageError as exc:
    ...     print(exc)
    /dev/null/out: cannot be an output folder: /dev/null is a file, not a folder
    """
    out = Path(out)
    try:
        _check(out, earlier_run=earlier_run)
    except OSError as exc:      # e.g. a name too long for the file system, even to look up
        raise UsageError(f"{out}: cannot be an output folder ({exc.strerror or exc})") from None


def _check(out: Path, *, earlier_run: bool) -> None:
    if out.exists() and not out.is_dir():
        raise UsageError(f"{out}: the output folder is an existing file, not a folder")
    if not out.exists():
        if earlier_run:
            raise UsageError(f"{out}: output folder not found")
        ancestor = next((p for p in out.parents if p.exists()), Path("."))
        if not ancestor.is_dir():
            raise UsageError(f"{out}: cannot be an output folder: {ancestor} is a file, "
                             "not a folder")
    made = _make_folders(out)
    try:
        fd, probe = tempfile.mkstemp(prefix=".write-check.", dir=out)
        os.close(fd)
        os.unlink(probe)
    except OSError as exc:
        raise UsageError(f"{out}: cannot write in the output folder "
                         f"({exc.strerror or exc})") from None
    finally:
        for folder in reversed(made):
            folder.rmdir()


def _make_folders(out: Path) -> list[Path]:
    """Create ``out`` and its missing parents; return the folders made (outermost first)."""
    missing = [p for p in (out, *out.parents) if not p.exists()][::-1]
    made: list[Path] = []
    try:
        for folder in missing:
            folder.mkdir()
            made.append(folder)
    except OSError as exc:
        for folder in reversed(made):
            folder.rmdir()
        raise UsageError(f"{out}: cannot create the output folder "
                         f"({exc.strerror or exc})") from None
    return made
