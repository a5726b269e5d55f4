"""Which scans to process: a manifest table or a BIDS derivatives folder -> one record per scan.

Whole-table problems (missing columns, no rows) are ``UsageError`` (exit 2, nothing computed);
problems of one row (bad date, duplicated session) become that scan's error and the batch goes on.
``day`` is counted from the earliest parseable date among a subject's rows, whether or not its mask
can be read, so days never shift when a broken file is fixed later.
"""
from __future__ import annotations

import re
from dataclasses import dataclass, field, replace
from datetime import UTC
from pathlib import Path

import numpy as np
import pandas as pd

from pipeline.errors import UsageError
from pipeline.io.tsv import read_table

REQUIRED = ("subject", "session", "mask")


@dataclass(frozen=True)
class Scan:
    """One mask to process, with where it came from and what is wrong with it, if anything."""

    subject: str
    session: str
    mask: str                   # path as given in the input
    mask_path: Path             # path to open
    day: float = float("nan")
    image: str = ""
    image_path: Path | None = None
    labels: tuple[int, ...] | None = None
    group: str = ""
    error: str = ""             # non-empty: the scan is refused for this reason
    source: str = ""            # manifest row or BIDS file, for messages
    extra: dict = field(default_factory=dict, compare=False)

    @property
    def key(self) -> tuple[str, str]:
        return (self.subject, self.session)

    def shown(self, text: str) -> str:
        """``text`` with the machine's resolved mask/image paths replaced by the paths as shown
        in tables (never an absolute path of this machine)."""
        text = text.replace(str(self.mask_path), self.mask)
        if self.image_path is not None and self.image:
            text = text.replace(str(self.image_path), self.image)
        return text


def read_inputs(path: str | Path, *, desc: str = "lesion") -> tuple[list[Scan], str]:
    """Scans of a manifest (``.tsv``/``.csv``) or a BIDS derivatives root; returns (scans, kind)."""
    path = Path(path)
    if path.is_dir():
        return discover_bids(path, desc=desc), "bids"
    if not path.exists():
        raise UsageError(f"{path}: input not found (expected a manifest .tsv/.csv or a BIDS "
                         "derivatives folder)")
    if path.suffix.lower() not in (".tsv", ".csv"):
        raise UsageError(f"{path}: input must be a .tsv or .csv manifest or a BIDS folder")
    return read_manifest(path), "manifest"


def read_manifest(path: Path) -> list[Scan]:
    """Scans listed in a manifest; relative paths are relative to the manifest's folder."""
    try:
        table = read_table(path, text_columns=("subject", "session", "mask", "image", "labels",
                                               "group", "date", "day"))
    except (pd.errors.ParserError, UnicodeDecodeError, pd.errors.EmptyDataError) as exc:
        raise UsageError(f"{path}: cannot read the manifest ({str(exc).splitlines()[0]})") \
            from None
    missing = [c for c in REQUIRED if c not in table.columns]
    has_date, has_day = "date" in table.columns, "day" in table.columns
    if missing or not (has_date or has_day):
        need = missing + ([] if has_date or has_day else ["date or day"])
        raise UsageError(f"{path}: manifest lacks column(s) {', '.join(need)}; found "
                         f"{', '.join(table.columns) or 'none'}")
    if has_date and has_day:
        raise UsageError(f"{path}: manifest has both 'date' and 'day'; give one of them")
    if table.empty:
        raise UsageError(f"{path}: manifest has no rows")
    base = path.parent
    scans = []
    for index, row in table.iterrows():
        scans.append(_manifest_scan(row, base, source=f"{path.name} row {index + 2}",
                                    date_column="date" if has_date else "day"))
    return finish_scans(scans)


def _manifest_scan(row: pd.Series, base: Path, *, source: str, date_column: str) -> Scan:
    mask = row["mask"]
    image = row.get("image", "") or ""
    scan = Scan(subject=row["subject"], session=row["session"], mask=shown_path(mask, base),
                mask_path=base / mask, image=shown_path(image, base),
                image_path=(base / image) if image else None, group=row.get("group", "") or "",
                source=source, extra={"when": row[date_column], "kind": date_column,
                                      "mask_given": mask, "image_given": image})
    problems = []
    if not scan.subject or not scan.session:
        problems.append("subject and session must not be empty")
    for what, value in (("subject", scan.subject), ("session", scan.session)):
        if any(c in value for c in "/\\\0") or value in (".", ".."):
            problems.append(f"{what} {value!r} must not contain '/', '\\' or be '.'/'..' "
                            "(it names output files)")
    if not mask:
        problems.append("mask path is empty")
    try:
        scan = replace(scan, labels=parse_labels(row.get("labels", "")))
    except ValueError as exc:
        problems.append(str(exc))
    return replace(scan, error="; ".join(problems)) if problems else scan


def shown_path(given: str, base: Path) -> str:
    """How a manifest path appears in tables and messages: as given when relative; an absolute
    path relative to the manifest's folder when it lies under it, else its file name only
    (absolute paths of the machine go to provenance.json alone).

    >>> shown_path("m/a.nii.gz", Path("/data")), shown_path("/data/m/a.nii.gz", Path("/data"))
    ('m/a.nii.gz', 'm/a.nii.gz')
    >>> shown_path("/elsewhere/a.nii.gz", Path("/data"))
    'a.nii.gz'
    """
    if not given or not Path(given).is_absolute():
        return given
    try:
        return Path(given).relative_to(base.absolute()).as_posix()
    except ValueError:
        return Path(given).name


def parse_labels(text: str) -> tuple[int, ...] | None:
    """The ``labels`` cell: ``1`` or ``1,3``; empty or ``n/a`` means every non-zero value.

    >>> parse_labels("1, 3"), parse_labels("")
    ((1, 3), None)
    """
    text = (text or "").strip()
    if text in ("", "n/a"):
        return None
    try:
        values = tuple(int(v) for v in re.split(r"[,;\s]+", text) if v)
    except ValueError:
        raise ValueError(f"labels {text!r} must be integers separated by commas") from None
    if not values or 0 in values:
        raise ValueError(f"labels {text!r} must list non-zero integers")
    return values


#: Largest ``day`` accepted (in magnitude): about 2,700 years; larger is a unit or origin mistake.
MAX_ABS_DAY = 1.0e6


def parse_when(value: str, kind: str) -> float:
    """A ``date`` cell as seconds-resolution days since 1 Jan 1 (for differences), or a ``day``.

    >>> parse_when("2024-03-02", "date") - parse_when("2024-02-28", "date")
    3.0
    >>> parse_when("2024-03-01T12:00:00", "date") - parse_when("2024-03-01", "date")
    0.5
    """
    from datetime import datetime

    text = (value or "").strip()
    if not text or text == "n/a":
        raise ValueError(f"{kind} is empty")
    if kind == "day":
        try:
            number = float(text)
        except ValueError:
            raise ValueError(f"day {text!r} is not a number") from None
        if not np.isfinite(number):
            raise ValueError(f"day {text!r} is not finite")
        if abs(number) > MAX_ABS_DAY:
            raise ValueError(f"day {text!r} is beyond +-{MAX_ABS_DAY:.0f} days (about 2,700 "
                             "years) from its reference; give days from a nearby reference")
        return number
    try:
        moment = datetime.fromisoformat(text.replace("Z", "+00:00"))
    except ValueError:
        raise ValueError(f"date {text!r} is not an ISO 8601 date or datetime") from None
    if moment.tzinfo is not None:
        try:
            moment = moment.astimezone(UTC).replace(tzinfo=None)
        except OverflowError:
            raise ValueError(f"date {text!r} is outside the calendar's range") from None
    return (moment - datetime(1, 1, 1)).total_seconds() / 86400.0


def subject_origins(scans: list[Scan]) -> dict[str, float]:
    """Each subject's day-0 moment (earliest parseable date or day among its rows), in the units of
    :func:`parse_when`, for turning event dates into days."""
    origins: dict[str, float] = {}
    for scan in scans:
        try:
            value = parse_when(scan.extra.get("when", ""), scan.extra.get("kind", "date"))
        except ValueError:
            continue
        origins[scan.subject] = min(origins.get(scan.subject, value), value)
    return origins


def finish_scans(scans: list[Scan]) -> list[Scan]:
    """Days from each subject's first session; refuse duplicated sessions and shared days."""
    when: list[float] = []
    for i, scan in enumerate(scans):
        try:
            when.append(parse_when(scan.extra.get("when", ""), scan.extra.get("kind", "date")))
        except ValueError as exc:
            when.append(float("nan"))
            if not (scan.error and not scan.extra.get("when")):  # an empty date: said already
                scans[i] = _refuse(scan, str(exc))
    first = subject_origins(scans)
    out = [replace(s, day=round(v - first[s.subject], 6)) if np.isfinite(v) else s
           for s, v in zip(scans, when)]
    keys = pd.Series([s.key for s in out])
    duplicated = keys.duplicated(keep=False).to_numpy()
    out = [_refuse(s, f"session {s.session} of subject {s.subject} is listed more than once; "
                   "every row of it is refused") if dup else s for s, dup in zip(out, duplicated)]
    return _refuse_unnameable(_refuse_mixed_groups(_refuse_shared_days(out)))


def _refuse_unnameable(scans: list[Scan]) -> list[Scan]:
    """Refuse rows whose labels cannot name files, or would name another row's files."""
    from pipeline.io.names import colliding, label_problems

    clashes = colliding([s.key for s in scans])
    for i, scan in enumerate(scans):
        problems = label_problems(scan.subject, scan.session)
        if i in clashes:
            problems.append(clashes[i])
        if problems:
            scans[i] = _refuse(scan, "; ".join(problems))
    return scans


def _refuse_mixed_groups(scans: list[Scan]) -> list[Scan]:
    """A subject belongs to one group: rows of one subject naming different groups are refused
    (which one is meant is unclear; an empty group counts as a value of its own)."""
    groups: dict[str, set[str]] = {}
    for scan in scans:
        groups.setdefault(scan.subject, set()).add(scan.group.strip())
    mixed = {s: sorted(g) for s, g in groups.items() if len(g) > 1}
    if not mixed:
        return scans
    return [_refuse(s, f"subject {s.subject} has different groups in its rows "
                       f"({', '.join(repr(g) for g in mixed[s.subject])}); every row of it is "
                       "refused") if s.subject in mixed else s for s in scans]


def _refuse_shared_days(scans: list[Scan]) -> list[Scan]:
    seen: dict[tuple[str, float], list[int]] = {}
    for i, scan in enumerate(scans):
        if np.isfinite(scan.day) and "more than once" not in scan.error:
            seen.setdefault((scan.subject, round(scan.day, 6)), []).append(i)
    for (subject, day), rows in seen.items():
        sessions = sorted({scans[i].session for i in rows})
        if len(sessions) > 1:
            for i in rows:
                scans[i] = _refuse(scans[i], f"sessions {', '.join(sessions)} of subject "
                                   f"{subject} fall on the same day {day:g}; their order is "
                                   "ambiguous")
    return scans


def _refuse(scan: Scan, reason: str) -> Scan:
    return replace(scan, error="; ".join(filter(None, [scan.error, reason])))


_ENTITY = re.compile(r"(?:^|_)(sub|ses|desc)-([A-Za-z0-9]+)")


def bids_entities(name: str) -> dict[str, str]:
    """Entities of a BIDS file name (parsed from the basename only).

    >>> bids_entities("sub-01_ses-2_desc-lesion_mask.nii.gz")
    {'sub': '01', 'ses': '2', 'desc': 'lesion'}
    """
    return {key: value for key, value in _ENTITY.findall(Path(name).name)}


def discover_bids(root: Path, *, desc: str = "lesion") -> list[Scan]:
    """Scans of a BIDS derivatives folder: ``sub-*/[ses-*/]anat/*_mask.nii[.gz]``."""
    subjects = sorted(p for p in root.glob("sub-*") if p.is_dir())
    if not subjects:
        raise UsageError(f"{root}: no sub-<label> folders; not a BIDS derivatives folder")
    scans: list[Scan] = []
    for subject_dir in subjects:
        scans.extend(_bids_subject(root, subject_dir, desc))
    if not scans:
        raise UsageError(f"{root}: no *_mask.nii or *_mask.nii.gz files under sub-*/[ses-*/]anat")
    return finish_scans(scans)


def _bids_subject(root: Path, subject_dir: Path, desc: str) -> list[Scan]:
    subject = subject_dir.name[4:]
    masks = sorted(subject_dir.glob("anat/*_mask.nii*")) + \
        sorted(subject_dir.glob("ses-*/anat/*_mask.nii*"))
    by_session: dict[str, list[Path]] = {}
    for mask in masks:
        if mask.name.endswith((".nii", ".nii.gz")):
            by_session.setdefault(_bids_session(mask, subject_dir), []).append(mask)
    dates, missing = _bids_dates(subject_dir, subject)
    scans = []
    for session, files in sorted(by_session.items()):
        chosen, problem = _choose_mask(files, desc, subject, session)
        rel = chosen.relative_to(root).as_posix()
        when = dates.get(session)
        scan = Scan(subject=subject, session=session, mask=rel, mask_path=chosen,
                    source=rel, extra={"when": when or "", "kind": "date"})
        if not session:
            problem = problem or "mask has no ses-<label>; sessions are needed to follow lesions"
        elif when is None:
            problem = problem or (f"{missing}; cannot date the session" if missing else
                                  f"no acq_time for ses-{session} in sub-{subject}/sub-{subject}"
                                  "_sessions.tsv; cannot date the session")
        scans.append(_refuse(scan, problem) if problem else scan)
    return scans


def _bids_session(mask: Path, subject_dir: Path) -> str:
    """The session a mask belongs to: its ``ses-<label>`` folder, else its file name's entity."""
    folder = mask.parent.parent
    if folder != subject_dir and folder.name.startswith("ses-"):
        return folder.name[4:]
    return bids_entities(mask.name).get("ses", "")


def _misnamed(mask: Path, subject: str, session: str) -> str:
    """Why a mask's file name disagrees with the folders it lies in (BIDS: entities in a file name
    repeat its sub-/ses- folders), or ''."""
    entities = bids_entities(mask.name)
    in_session = mask.parent.parent.name.startswith("ses-")
    if entities.get("sub") != subject or (in_session and entities.get("ses") != session):
        folders = f"sub-{subject}/" + (f"ses-{session}/" if in_session else "")
        return f"{mask.name} is misnamed: it lies in {folders} but its name does not start " \
            f"with sub-{subject}" + (f"_ses-{session}" if in_session else "")
    return ""


def _choose_mask(files: list[Path], desc: str, subject: str = "",
                 session: str = "") -> tuple[Path, str]:
    named = [f for f in files if not _misnamed(f, subject, session)] if subject else files
    if not named:
        return files[0], "; ".join(_misnamed(f, subject, session) for f in files)
    if len(named) == 1:
        return named[0], ""
    wanted = [f for f in named if bids_entities(f.name).get("desc") == desc]
    if len(wanted) == 1:
        return wanted[0], ""
    names = ", ".join(f.name for f in named)
    return named[0], (f"several masks and {len(wanted)} with desc-{desc}: {names}; choose one "
                      "with --desc")


def _bids_dates(subject_dir: Path, subject: str) -> tuple[dict[str, str], str]:
    """Session dates of ``sub-<s>_sessions.tsv``, and why there are none when the file is
    missing or lacks its columns."""
    name = f"sub-{subject}/sub-{subject}_sessions.tsv"
    path = subject_dir / f"sub-{subject}_sessions.tsv"
    if not path.exists():
        return {}, f"{name} not found"
    table = read_table(path, text_columns=("session_id", "acq_time"))
    if "session_id" not in table.columns or "acq_time" not in table.columns:
        return {}, f"{name} lacks the columns session_id and acq_time"
    return {str(s).removeprefix("ses-"): t
            for s, t in zip(table.session_id, table.acq_time)}, ""
