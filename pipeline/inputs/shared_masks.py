"""Warnings for one mask standing for several sessions of a subject (a copy-and-paste slip in a
manifest: the series would look perfectly stable)."""
from __future__ import annotations

import os
from pathlib import Path

from pipeline.inputs.manifest import Scan


def _identity(path: Path) -> tuple:
    try:
        info = os.stat(path)
        return ("file", info.st_dev, info.st_ino)      # the same file under any name or link
    except OSError:
        return ("path", os.path.abspath(path))


def repeated_masks(scans: list[Scan], shas: dict[tuple[str, str], str] | None = None
                   ) -> list[tuple[str, list[Scan], str]]:
    """(subject, scans, message) for each mask file, or mask content when ``shas`` gives the
    SHA-256 of scans that have lesions, shared by several sessions of one subject.

    Examples
    --------
    >>> a = Scan("S", "1", "m.nii.gz", Path("nowhere/m.nii.gz"))
    >>> b = Scan("S", "2", "m.nii.gz", Path("nowhere/m.nii.gz"))
    >>> [(s, m) for s, _, m in repeated_masks([a, b])]
    [('S', 'the same mask file m.nii.gz is given for sessions 1, 2')]
    """
    found = []
    usable = [s for s in scans if not s.error]
    for what, key in (("file", lambda s: _identity(s.mask_path)),
                      ("content", lambda s: (shas or {}).get(s.key))):
        groups: dict[tuple, list[Scan]] = {}
        for scan in usable:
            value = key(scan)
            if value is not None:
                groups.setdefault((scan.subject, value), []).append(scan)
        for (subject, _), members in groups.items():
            sessions = ", ".join(s.session for s in members)
            if what == "file" and len(members) > 1:
                found.append((subject, members, f"the same mask file {members[0].mask} is given "
                              f"for sessions {sessions}"))
            elif what == "content" and len({_identity(s.mask_path) for s in members}) > 1:
                found.append((subject, members, f"sessions {sessions} have masks with identical "
                              f"content ({', '.join(s.mask for s in members)})"))
    return found
