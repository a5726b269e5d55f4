"""Reading what the report shows from OUT: tables, provenance, track images and MRI images.

Nothing here recomputes a stage. A missing or unreadable file becomes a message, never an
exception, so the report can say what it could not show.
"""
from __future__ import annotations

import json
import math
import zlib
from collections.abc import Sequence
from dataclasses import dataclass, field
from pathlib import Path

import nibabel as nib
import numpy as np
import pandas as pd

from pipeline.errors import PipelineError
from pipeline.geometry import voxel_volume_mm3
from pipeline.io.names import track_path
from pipeline.io.nifti import load_image, load_mask
from pipeline.io.tsv import read_table

#: Files the report reads, with what they hold (for "missing" messages). Optional ones last.
INPUT_FILES: dict[str, str] = {
    "lesions.tsv": "lesion components of every mask (stage 1)",
    "masks.tsv": "every scan that was read (stage 1)",
    "matches.tsv": "links between sessions (stage 2)",
    "longitudinal.tsv": "lesion tracks over sessions (stage 2)",
    "fits.tsv": "growth-law fits per lesion and phase (stage 3)",
    "group_fits.tsv": "group fits with a shared exponent (stage 3)",
    "errors.tsv": "inputs that failed",
    "evaluation.tsv": "separation of outcomes by a fitted figure (optional)",
    "events.tsv": "treatment events (optional)",
}
OPTIONAL_FILES = ("evaluation.tsv", "events.tsv")
#: Columns without which a table cannot be used, and which of them must be whole numbers.
_REQUIRED = {
    "lesions.tsv": (("subject", "session", "component"), ("component",)),
    "masks.tsv": (("subject", "session"), ()),
    "matches.tsv": (("subject", "session_from", "component_from", "session_to", "component_to"),
                    ("component_from", "component_to")),
    "longitudinal.tsv": (("subject", "lesion", "session", "day"), ("lesion",)),
    "fits.tsv": (("subject", "lesion"), ("lesion",)),
    "group_fits.tsv": (("beta",), ()),
    "events.tsv": (("subject", "day"), ()),
}

_IMAGE_ERRORS = (OSError, ValueError, EOFError, zlib.error, nib.filebasedimages.ImageFileError)


@dataclass(frozen=True)
class ReportInputs:
    """Everything read from OUT. A missing table is an empty DataFrame plus a message."""

    out_dir: Path
    tables: dict[str, pd.DataFrame]
    problems: dict[str, str]
    provenance: dict
    _by_subject: dict = field(default_factory=dict, repr=False, compare=False)

    def table(self, name: str, *, optional: bool = False) -> pd.DataFrame:
        """The table read from ``name`` (empty when missing).

        A table not in :data:`INPUT_FILES` is read from OUT on first use, and its absence is
        recorded like any other (unless ``optional``: a table a setting may turn off), so a new
        section needs only its data function.
        """
        if name not in self.tables and name.endswith(".tsv"):
            self.tables[name], problem = read_one(self.out_dir, name, "its section")
            if problem and not (optional and not (self.out_dir / name).exists()):
                self.problems[name] = problem
        return self.tables.get(name, pd.DataFrame())

    def of_subject(self, name: str, subject: str) -> pd.DataFrame:
        """Rows of table ``name`` for one subject (the table is split once, on first use)."""
        if name not in self._by_subject:
            table = self.table(name)
            self._by_subject[name] = {} if table.empty or "subject" not in table else {
                str(key): rows for key, rows in table.groupby(
                    table["subject"].astype(str), sort=False)}
        found = self._by_subject[name].get(subject)
        return found if found is not None else subject_rows(self.table(name), "\0none")


def load_inputs(out_dir: str | Path, *, out_of_date: Sequence[str] = ()) -> ReportInputs:
    """Read every table the report uses from ``out_dir``; record what is missing or unreadable.

    Examples
    --------
    >>> import tempfile
    >>> inputs = load_inputs(tempfile.mkdtemp())
    >>> inputs.problems["fits.tsv"]
    'fits.tsv is missing: growth-law fits per lesion and phase (stage 3) cannot be shown.'
    """
    out = Path(out_dir)
    tables: dict[str, pd.DataFrame] = {}
    problems: dict[str, str] = {}
    for name, what in INPUT_FILES.items():
        tables[name], problem = read_one(out, name, what)
        if problem:
            problems[name] = problem
    provenance: dict = {}
    path = out / "provenance.json"
    if not path.is_file():
        problems["provenance.json"] = "provenance.json is missing: run details cannot be shown."
    else:
        try:
            loaded = json.loads(path.read_text(encoding="utf-8"))
            provenance = loaded if isinstance(loaded, dict) else {}
        except (OSError, ValueError) as exc:
            problems["provenance.json"] = f"provenance.json could not be read ({_short(exc)})."
    if not (out / "tracks").is_dir():
        problems["tracks/"] = "tracks/ is missing: lesion slices cannot be drawn."
    for number, text in enumerate(out_of_date, start=1):
        problems[f"run state {number}"] = f"Out of date: {text}; the page shows it as it is."
    return ReportInputs(out, tables, problems, provenance)


def read_one(out: Path, name: str, what: str) -> tuple[pd.DataFrame, str]:
    """One table of OUT and the message when it is missing or unusable (else "")."""
    path = out / name
    if not path.is_file():
        return pd.DataFrame(), f"{name} is missing: {what} cannot be shown."
    try:
        table, note = _checked(name, read_table(path))
    except (OSError, ValueError, UnicodeDecodeError) as exc:
        table, note = pd.DataFrame(), f"could not be read ({_short(exc)})"
    return table, (f"{name} {note}: {what} cannot be shown." if note else "")


def _checked(name: str, table: pd.DataFrame) -> tuple[pd.DataFrame, str]:
    """Refuse a table without its key columns; drop rows whose ids are not whole numbers."""
    required, whole = _REQUIRED.get(name, ((), ()))
    missing = [c for c in required if c not in table]
    if missing:
        return pd.DataFrame(), f"lacks the column(s) {', '.join(missing)}"
    for column in ("subject", "session", "session_from", "session_to"):
        if column in table:
            table = table.assign(**{column: table[column].astype(str)})
    for column in whole:
        values = pd.to_numeric(table[column], errors="coerce")
        table = table[values.notna() & (values == values.round())].assign(
            **{column: values.dropna().astype("int64")})
    if "day" in table:
        table = table.assign(day=pd.to_numeric(table["day"], errors="coerce"))
    return table, ""


def _short(exc: BaseException) -> str:
    text = str(exc).splitlines()[0] if str(exc) else type(exc).__name__
    return text[:160]


def subject_rows(table: pd.DataFrame, subject: str) -> pd.DataFrame:
    """Rows of ``table`` for one subject (empty when the table has no subject column)."""
    if table.empty or "subject" not in table:
        return table.iloc[0:0]
    return table[table["subject"].astype(str) == subject]


def records(frame: pd.DataFrame) -> list[dict]:
    """Rows of ``frame`` as dicts of plain Python values (much faster than ``iterrows``).

    Examples
    --------
    >>> records(pd.DataFrame({"a": [1], "b": ["x"]}))
    [{'a': 1, 'b': 'x'}]
    """
    columns = list(frame.columns)
    return [dict(zip(columns, row)) for row in frame.to_numpy(dtype=object).tolist()]


def is_true(value: object) -> bool:
    """True for booleans True and text such as ``true``/``yes``/``1``."""
    if isinstance(value, (bool, np.bool_)):
        return bool(value)
    return str(value).strip().lower() in {"true", "yes", "1", "y"}


def as_number(value: object) -> float:
    """Float of ``value``, NaN when it is missing or not a number."""
    try:
        number = float(value)  # type: ignore[arg-type]
    except (TypeError, ValueError):
        return math.nan
    return number


@dataclass(frozen=True)
class Scan:
    """One session's track image: as stored (for bounding boxes) and in RAS orientation."""

    stored: np.ndarray
    canonical: np.ndarray
    affine: np.ndarray          # canonical voxel -> RAS+ mm
    stored_affine: np.ndarray


@dataclass
class ScanCache:
    """Track and MRI images of one subject, each read at most once."""

    inputs: ReportInputs
    subject: str
    _tracks: dict = field(default_factory=dict)
    _images: dict = field(default_factory=dict)

    def track(self, session: str) -> Scan | None:
        """The session's track image, or None when it is missing or unreadable."""
        if session not in self._tracks:
            self._tracks[session] = _read_scan(track_path(self.inputs.out_dir, self.subject,
                                                          session))
        return self._tracks[session]

    def image(self, session: str) -> tuple[np.ndarray | None, str]:
        """The MRI image on the track's grid (RAS orientation) and a note when it is not used."""
        if session not in self._images:
            self._images[session] = self._read_image(session)
        return self._images[session]

    def _read_image(self, session: str) -> tuple[np.ndarray | None, str]:
        rows = self.inputs.of_subject("masks.tsv", self.subject)
        rows = rows[rows["session"].astype(str) == session] if "session" in rows else rows
        given = str(rows["image"].iloc[0]) if "image" in rows and len(rows) else ""
        if not given:
            return None, "no image given"
        path = find_image(self.inputs, given)
        scan = self.track(session)
        if path is None:
            return None, "image not found"
        if scan is None:
            return None, "no track image"
        if _changed(self.inputs, self.subject, session, path):
            return None, "image changed after the run"
        try:
            data, affine = load_image(path)
        except (PipelineError, *_IMAGE_ERRORS) as exc:
            return None, f"image could not be read ({_short(exc)})"
        if data.shape != scan.stored.shape or not np.allclose(affine, scan.stored_affine,
                                                              atol=1e-3):
            return None, "image grid differs from the mask"
        return canonical(data, affine)[0], ""

    def window(self, session: str) -> tuple[float, float] | None:
        """Grey-level window of the session's MRI image: its 1st and 99.5th percentiles."""
        data, _ = self.image(session)
        if data is None:
            return None
        sample = data[::4, ::4, ::4]
        sample = sample[np.isfinite(sample)]
        if sample.size == 0:
            return None
        low, high = np.percentile(sample, [1.0, 99.5])
        return float(low), float(max(high, low + 1e-6))


def _changed(inputs: ReportInputs, subject: str, session: str, path: Path) -> bool:
    """Whether the image's SHA-256 differs from the one provenance.json recorded for it."""
    import hashlib

    scans = inputs.provenance.get("scans", [])
    recorded = next((s.get("image_sha256") for s in scans if isinstance(s, dict)
                     and s.get("subject") == subject and s.get("session") == session), None)
    if not recorded:
        return False
    with open(path, "rb") as handle:
        return hashlib.file_digest(handle, "sha256").hexdigest() != recorded


def canonical(data: np.ndarray, affine: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """``data`` turned to the closest RAS orientation (a view: axes flipped or swapped) and
    its affine, as nibabel's ``as_closest_canonical`` does.

    Examples
    --------
    >>> flipped = np.diag([-2.0, 1.0, 1.0, 1.0])
    >>> data, affine = canonical(np.arange(3).reshape(3, 1, 1), flipped)
    >>> data.ravel().tolist(), affine[0].tolist()
    ([2, 1, 0], [2.0, 0.0, 0.0, -4.0])
    """
    ornt = nib.orientations.io_orientation(affine)
    if np.array_equal(ornt, [[0, 1], [1, 1], [2, 1]]):
        return data, affine
    turned = nib.orientations.apply_orientation(data, ornt)
    return turned, affine @ nib.orientations.inv_ornt_aff(ornt, data.shape)


def _read_scan(path: Path) -> Scan | None:
    if not path.is_file():
        return None
    try:
        mask = load_mask(path)
    except (PipelineError, *_IMAGE_ERRORS):
        return None
    turned, affine = canonical(mask.data, mask.affine)
    return Scan(mask.data, turned, affine, mask.affine)


def find_image(inputs: ReportInputs, given: str) -> Path | None:
    """Locate an ``image`` path of masks.tsv: absolute, or relative to the input's folder.

    The input path in provenance.json is as given on the command line; it is tried as is, and
    relative to OUT and to OUT's parent, since the report may be built from another folder.
    """
    path = Path(given)
    if path.is_absolute():
        return path if path.is_file() else None
    source = inputs.provenance.get("input", {}) if isinstance(
        inputs.provenance.get("input"), dict) else {}
    bases: list[Path] = []
    if source.get("path_from_out"):        # where the input was at run time, seen from OUT
        root = inputs.out_dir / str(source["path_from_out"])
        bases.append(root if source.get("kind") == "bids" or root.is_dir() else root.parent)
    if source.get("path"):
        root = Path(str(source["path"]))
        root = root if source.get("kind") == "bids" or root.is_dir() else root.parent
        bases += [root] if root.is_absolute() else [root, inputs.out_dir / root,
                                                     inputs.out_dir.parent / root]
    bases += [inputs.out_dir, inputs.out_dir / "inputs"]
    for base in bases:
        candidate = base / path
        if candidate.is_file():
            return candidate
    return None


def component_lesions(assignment: pd.DataFrame, matches: pd.DataFrame | None = None
                      ) -> dict[tuple[str, int], int]:
    """Map (session, component) of one subject to its lesion id, as stage 2 assigned it.

    ``assignment`` holds the subject's rows of lesion_components.tsv (stage 2's component ->
    lesion table). An OUT written before that table existed has the ids only on the links:
    the ``lesion_from`` / ``lesion_to`` columns of matches.tsv give every linked component's
    lesion (a component seen at one session only, with no link, is then left out).

    Examples
    --------
    >>> rows = pd.DataFrame({"session": ["1", "2"], "component": [1, 1], "lesion": [1, 1]})
    >>> component_lesions(rows)
    {('1', 1): 1, ('2', 1): 1}
    """
    mapping: dict[tuple[str, int], int] = {}
    if len(assignment) and {"session", "component", "lesion"} <= set(assignment.columns):
        for row in records(assignment):
            if math.isfinite(as_number(row["lesion"])):
                mapping[(str(row["session"]), int(row["component"]))] = int(row["lesion"])
        return mapping
    if matches is not None and len(matches):
        for end in ("from", "to"):
            if f"lesion_{end}" not in matches:
                continue
            for row in records(matches):
                lesion = as_number(row[f"lesion_{end}"])
                key = (str(row[f"session_{end}"]), int(row[f"component_{end}"]))
                if math.isfinite(lesion):
                    mapping.setdefault(key, int(lesion))
    return mapping


def lesion_centres(cache: ScanCache, lesion: int, sessions: list[str],
                   components: pd.DataFrame | None = None
                   ) -> tuple[dict[str, np.ndarray], float]:
    """RAS mm centroid of ``lesion`` per session where it is seen, and its largest radius (mm)
    from its volume (sphere of equal volume).

    From the lesion's rows of lesions.tsv (``components``: centroid_x/y/z_mm weighted by
    volume_mm3) when they carry centroids, which needs no image; otherwise from the track
    images.
    """
    columns = ["centroid_x_mm", "centroid_y_mm", "centroid_z_mm", "volume_mm3"]
    if components is not None and len(components) and all(c in components for c in columns):
        values = np.array([pd.to_numeric(components[c], errors="coerce").to_numpy(float)
                           for c in columns]).T
        names = components["session"].astype(str).to_numpy()
        usable = np.isfinite(values).all(axis=1) & (values[:, 3] > 0)
        centres, radius = {}, 0.0
        for session in dict.fromkeys(names[usable]):
            if session not in sessions:
                continue
            rows = values[usable & (names == session)]
            weights = rows[:, 3]
            centres[session] = (rows[:, :3] * weights[:, None]).sum(axis=0) / weights.sum()
            radius = max(radius, (3.0 * weights.sum() / (4.0 * math.pi)) ** (1 / 3))
        if centres:
            return centres, radius
    return _track_centres(cache, lesion, sessions)


def _track_centres(cache: ScanCache, lesion: int,
                   sessions: list[str]) -> tuple[dict[str, np.ndarray], float]:
    centres: dict[str, np.ndarray] = {}
    radius = 0.0
    for session in sessions:
        scan = cache.track(session)
        if scan is None:
            continue
        ijk = np.argwhere(scan.canonical == lesion)
        if ijk.size == 0:
            continue
        centres[session] = (scan.affine @ np.append(ijk.mean(axis=0), 1.0))[:3]
        volume = len(ijk) * voxel_volume_mm3(scan.affine)
        radius = max(radius, (3.0 * volume / (4.0 * math.pi)) ** (1 / 3))
    return centres, radius
