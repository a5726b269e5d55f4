"""Stage 1 as it was recorded, for the commands that build on an earlier run (``match``, ``fit``).

The input is found where it was at run time (its path relative to OUT is kept in
``provenance.json``; the path as given is tried next), and it must be the same: the manifest's
SHA-256 and a digest of the scans it lists must equal what stage 1 recorded, and every mask that
is still there must have the SHA-256 of ``masks.tsv``. Each scan's measured components come from
``OUT/.cache`` (a mask that has moved away is then still usable) or, failing that, from the mask
itself, with the volume settings stage 1 used; the rebuilt lesion table must equal
``lesions.tsv``. Anything else is a refusal naming the input and the reason.
"""
from __future__ import annotations

import hashlib
import json
import os
from pathlib import Path

from pipeline.errors import UsageError
from pipeline.inputs.manifest import Scan, read_inputs
from pipeline.run.stage1 import Stage1, error_row


def location_from_out(out: Path, input: Path) -> str:
    """``input`` relative to OUT (both resolved), kept so that later commands find it from any
    working folder.

    >>> location_from_out(Path("/d/out"), Path("/d/in/m.tsv"))
    '../in/m.tsv'
    """
    return os.path.relpath(Path(input).resolve(), Path(out).resolve())


def scans_digest(scans: list[Scan]) -> str:
    """SHA-256 of what the input says about every scan (labels, days as given, files, groups,
    refusals): the same for a manifest or BIDS folder that was not changed."""
    rows = [[s.subject, s.session, s.mask, str(s.extra.get("when", "")),
             str(s.extra.get("kind", "")), s.image, list(s.labels or ()), s.group, s.error]
            for s in scans]
    return hashlib.sha256(json.dumps(rows).encode()).hexdigest()


def _sha(path: Path) -> str:
    with open(path, "rb") as handle:
        return hashlib.file_digest(handle, "sha256").hexdigest()


def _locate(out: Path, provenance: dict) -> Path:
    """Stage 1's input as at run time (checked against its recorded SHA-256 for a manifest)."""
    source = provenance.get("input", {})
    given = str(source.get("path", ""))
    expected = provenance.get("files", {}).get("input", {}).get("sha256")
    candidates = [out / source["path_from_out"]] if source.get("path_from_out") else []
    candidates.append(Path(given))     # absolute; or, for OUTs of older versions, from here
    changed = None
    for path in candidates:
        if not path.exists():
            continue
        if source.get("kind") == "manifest" and expected and _sha(path) != expected:
            changed = changed or path
            continue
        return path
    if changed is not None:
        raise UsageError(f"{given}: the manifest changed after stage 1 ran (its SHA-256 differs "
                         f"from provenance.json in {out}); restore it, or rerun 'lesion-growth "
                         f"run' on it")
    raise UsageError(f"{out}: the input of stage 1 ({given}) is no longer where it was; restore "
                     "it, or rerun 'lesion-growth run' on it")


def recorded_scans(out: Path, provenance: dict) -> list[Scan]:
    """The scans of stage 1's input, read where it was and checked to be unchanged."""
    path = _locate(out, provenance)
    volumes = provenance.get("configuration", {}).get("volumes", {})
    scans, _ = read_inputs(path, desc=volumes.get("desc", "lesion"))
    expected = provenance.get("input", {}).get("scans_sha256")
    if expected and scans_digest(scans) != expected:
        raise UsageError(f"{provenance['input']['path']}: the input lists other scans, days or "
                         "files than when stage 1 ran; rerun 'lesion-growth run' on it")
    return scans


def recorded_stage1(out: Path, provenance: dict, *, check_images: bool = False) -> Stage1:
    """Stage 1 of the run recorded in OUT, without rewriting its tables (see the module)."""
    from pipeline.io.tsv import read_table

    scans = recorded_scans(out, provenance)
    config = _recorded_config(provenance)
    masks = read_table(out / "masks.tsv")
    shas = dict(zip(zip(masks.subject.astype(str), masks.session.astype(str)), masks.sha256))
    images = {(s.get("subject"), s.get("session")): s.get("image_sha256")
              for s in provenance.get("scans", [])}
    stage = Stage1(scans=scans, kind=provenance.get("input", {}).get("kind", "manifest"))
    version = provenance.get("tool", {}).get("version", "")
    digest = f"{version}|{config.digest('volumes')}"
    problems: list[str] = []
    for scan in scans:
        if scan.error or scan.key not in shas:
            if scan.error:
                stage.errors.append(error_row(scan, scan.error, "input"))
            continue             # failed at stage 1: stays failed until stage 1 is rerun
        result = _recorded_result(out, scan, shas[scan.key], digest, config, problems)
        if result is not None:
            stage.results[scan.key] = result
        expected = images.get(scan.key)
        if check_images and expected and scan.image_path is not None and (
                not scan.image_path.is_file() or _sha(scan.image_path) != expected):
            problems.append(f"sub {scan.subject} ses {scan.session}: image {scan.image} is "
                            "missing or changed since stage 1 ran")
    if problems:
        more = f" (and {len(problems) - 1} more)" if len(problems) > 1 else ""
        raise UsageError(f"{out}: {problems[0]}{more}; restore it, or rerun 'lesion-growth run'")
    from pipeline.run.stage1 import _stage1_tables

    stage.lesions, stage.masks = _stage1_tables(stage)
    _same_as_recorded(out, stage)
    return stage


def _recorded_config(provenance: dict):
    from pipeline.config import load_config

    volumes = provenance.get("configuration", {}).get("volumes", {})
    return load_config(None, volumes=dict(volumes))


def _recorded_result(out: Path, scan: Scan, sha: str, digest: str, config, problems: list[str]):
    from pipeline.run import cache
    from pipeline.run.executors import volumes_task

    present = scan.mask_path.is_file()
    if present and _sha(scan.mask_path) != sha:
        problems.append(f"sub {scan.subject} ses {scan.session}: mask {scan.mask} changed after "
                        "stage 1 ran (its SHA-256 differs from masks.tsv)")
        return None
    folder = out / ".cache" / "volumes"
    hit = cache.load_result(folder, cache.cache_key(sha, digest, scan.labels), scan.subject,
                            scan.session, str(scan.mask_path))
    if hit is not None:
        return hit.compact()
    if not present:
        problems.append(f"sub {scan.subject} ses {scan.session}: mask {scan.mask} is no longer "
                        "there and OUT/.cache holds no result for it")
        return None
    result = volumes_task(scan.subject, scan.session, str(scan.mask_path), scan.labels,
                          config.volumes, str(folder), digest).compact()
    if not result.ok or result.sha256 != sha:
        problems.append(f"sub {scan.subject} ses {scan.session}: mask {scan.mask} no longer "
                        "gives the result stage 1 recorded")
        return None
    return result


def _same_as_recorded(out: Path, stage: Stage1) -> None:
    """Refuse when the rebuilt components differ from lesions.tsv (e.g. another tool version)."""
    from pipeline.io.tsv import read_table

    def rows(table):
        return sorted(zip(table.subject.astype(str), table.session.astype(str),
                          table.component.astype(int), table.voxels.astype(int)))
    recorded = read_table(out / "lesions.tsv")
    if rows(recorded) != rows(stage.lesions):
        raise UsageError(f"{out}: the lesion components rebuilt from the recorded inputs differ "
                         "from lesions.tsv (written by another version or edited?); rerun "
                         "'lesion-growth run' (or 'volumes')")
