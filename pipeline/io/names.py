"""The one rule that turns subject and session labels into file names, and the refusals it needs.

Tables keep labels exactly as given; files are named from a *file label*: the label without one
leading ``sub-``/``ses-`` prefix, decomposed (Unicode NFKD) and reduced to the ASCII letters and
digits, because a BIDS label is alphanumeric (BIDS specification, "Entities": ``<label>`` is
``[0-9a-zA-Z]+``) and ``_``/``-`` separate entities. Two labels with the same file label compared
without letter case would name the same files (on a case-insensitive file system too), so every
row of all of them is refused up front; so is a label without a letter or digit and one whose file
names would be longer than :data:`NAME_MAX_BYTES`.
"""
from __future__ import annotations

import re
import unicodedata
from pathlib import Path

#: Longest file name (bytes) most file systems accept (ext4, XFS, APFS, NTFS): common practice.
NAME_MAX_BYTES = 255

#: Every file name built from a subject and a session label; ``{s}``/``{t}`` are file labels.
#: The BIDS-style name of a track image is listed so that moving to it needs no new limit.
TEMPLATES = ("sub-{s}_ses-{t}_tracks.nii.gz", "sub-{s}_ses-{t}_desc-tracks_dseg.nii.gz",
             "sub-{s}_ses-{t}_desc-tracks_dseg.json")

#: What an atomic write adds to a name: ``.<stem>.<8 random characters><suffixes>`` (see
#: pipeline.io.atomic.atomic_path: a dot in front, a dot and tempfile's 8 characters after the
#: stem).
TEMPORARY_EXTRA = 1 + 1 + 8

#: Characters the longest template and its temporary name use besides the two labels.
_FIXED = max(len(t.format(s="", t="")) for t in TEMPLATES) + TEMPORARY_EXTRA

#: Most characters a subject's and a session's file label may have together.
MAX_LABELS_CHARS = NAME_MAX_BYTES - _FIXED

_PREFIX = {"subject": "sub", "session": "ses"}


def file_label(what: str, value: str) -> str:
    """The part of file names that stands for a subject or session label.

    >>> file_label("subject", "sub-01"), file_label("subject", "01")
    ('01', '01')
    >>> file_label("subject", "P-001_a"), file_label("session", "ses-Baseline")
    ('P001a', 'Baseline')
    >>> file_label("subject", "Jose\\u0301"), file_label("subject", "Jos\\u00e9")
    ('Jose', 'Jose')
    """
    text = str(value).removeprefix(f"{_PREFIX[what]}-")
    text = unicodedata.normalize("NFKD", text)
    return re.sub(r"[^A-Za-z0-9]", "", text)


def track_path(out: Path, subject: str, session: str) -> Path:
    """``OUT/tracks/sub-<s>_ses-<t>_tracks.nii.gz`` from the file labels: the one naming rule of
    track images, for stage 2 writing them and the report reading them.

    >>> track_path(Path("out"), "sub-01", "1").as_posix()
    'out/tracks/sub-01_ses-1_tracks.nii.gz'
    >>> track_path(Path("out"), "P-01", "ses-b_1").name
    'sub-P01_ses-b1_tracks.nii.gz'
    """
    name = TEMPLATES[0].format(s=file_label("subject", subject),
                               t=file_label("session", session))
    return out / "tracks" / name


def _why_same(values: list[str], what: str) -> str:
    """Why distinct labels share one file label, in words a person recognises."""
    prefix = f"{_PREFIX[what]}-"
    bare = {v.removeprefix(prefix) for v in values}
    if len(bare) == 1:
        return f"they differ only in a '{prefix}' prefix"
    normal = {unicodedata.normalize("NFC", v) for v in bare}
    if len(normal) == 1:
        return "they differ only in Unicode normalisation and look identical"
    if len({v.casefold() for v in normal}) == 1:
        return "they differ only in letter case (the same file on case-insensitive file systems)"
    return "file names keep only the ASCII letters and digits of a label (BIDS labels are " \
        "alphanumeric)"


def label_problems(subject: str, session: str) -> list[str]:
    """Reasons one row's labels cannot name files (empty when they can).

    >>> label_problems("01", "1")
    []
    >>> label_problems("--", "1")
    ["subject '--' has no ASCII letter or digit to name files with (BIDS labels are alphanumeric)"]
    >>> label_problems("a" * 150, "b" * 100)[0][:62]
    'subject and session labels are 250 characters together in file'
    """
    problems = []
    for what, value in (("subject", subject), ("session", session)):
        if value and not file_label(what, value):
            problems.append(f"{what} {value!r} has no ASCII letter or digit to name files with "
                            "(BIDS labels are alphanumeric)")
    size = len(file_label("subject", subject)) + len(file_label("session", session))
    if size > MAX_LABELS_CHARS:
        problems.append(f"subject and session labels are {size} characters together in file "
                        f"names, more than the {MAX_LABELS_CHARS} allowed (file names are at "
                        f"most {NAME_MAX_BYTES} bytes)")
    return problems


def colliding(labels: list[tuple[str, str]]) -> dict[int, str]:
    """Rows whose labels would name the same files as another row's different labels.

    ``labels`` holds (subject, session) per row; the answer maps a row's index to the reason.
    Subjects collide across the whole input; sessions within one subject.

    >>> colliding([("sub-01", "1"), ("01", "1"), ("02", "1")])  # doctest: +ELLIPSIS
    {0: "subjects '01', 'sub-01' would name the same files (sub-01...", 1: ...}
    >>> colliding([("A", "ses-1"), ("A", "1"), ("A", "2")])[1][:46]
    "sessions '1', 'ses-1' of subject 'A' would nam"
    """
    reasons: dict[int, str] = {}
    subjects: dict[str, set[str]] = {}
    for subject, _ in labels:
        subjects.setdefault(file_label("subject", subject).casefold(), set()).add(subject)
    for i, (subject, _) in enumerate(labels):
        group = sorted(subjects[file_label("subject", subject).casefold()])
        if len(group) > 1:
            reasons[i] = (f"subjects {', '.join(map(repr, group))} would name the same files "
                          f"(sub-{file_label('subject', subject)}): {_why_same(group, 'subject')}"
                          "; every row of them is refused")
    sessions: dict[tuple[str, str], set[str]] = {}
    for subject, session in labels:
        sessions.setdefault((subject, file_label("session", session).casefold()),
                            set()).add(session)
    for i, (subject, session) in enumerate(labels):
        group = sorted(sessions[(subject, file_label("session", session).casefold())])
        if len(group) > 1 and i not in reasons:
            reasons[i] = (f"sessions {', '.join(map(repr, group))} of subject {subject!r} would "
                          f"name the same files (ses-{file_label('session', session)}): "
                          f"{_why_same(group, 'session')}; every row of them is refused")
    return reasons
