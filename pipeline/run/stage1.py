"""The stages wired to files: what ``lesion-growth`` commands run. Only this module and ``cli``
decide which file is read or written; the stages themselves work on in-memory tables."""
from __future__ import annotations

import json
import sys
from collections.abc import Callable
from dataclasses import dataclass, field
from pathlib import Path

import pandas as pd

from pipeline import __version__
from pipeline.run.results import ScanResult
from pipeline.run.executors import run_tasks, start_pool_server, volumes_task
from pipeline.config import Config
from pipeline.inputs.manifest import Scan, read_inputs
from pipeline.io.names import track_path
from pipeline.run.catalog import write_output
from pipeline.run.sidecars import ERROR_COLUMNS, MASK_COLUMNS
from pipeline.volumes.components import LESION_COLUMNS, LabelledScan
from pipeline.geometry import voxel_volume_mm3


def say(message: str) -> None:
    """One line for a person, on stderr (stdout stays clean for scripts)."""
    print(message, file=sys.stderr, flush=True)


@dataclass
class Stage1:
    """Everything stage 1 produced, in memory, for the later stages of the same run."""

    scans: list[Scan]
    kind: str
    results: dict[tuple[str, str], ScanResult] = field(default_factory=dict)
    errors: list[dict] = field(default_factory=list)
    lesions: pd.DataFrame | None = None
    masks: pd.DataFrame | None = None
    reused: int = 0          # scans whose result an earlier run stored (not one of this run)

    @property
    def recomputed(self) -> int:
        return sum(1 for r in self.results.values() if r.ok and not r.cached)

    def labelled(self, subject: str) -> list[LabelledScan]:
        """The subject's successfully read scans, ordered by day."""
        out = []
        for scan in sorted(self.scans, key=lambda s: (s.day, s.session)):
            result = self.results.get(scan.key)
            if scan.subject == subject and not scan.error and result is not None and result.ok:
                out.append(LabelledScan(scan.subject, scan.session, scan.day,
                                        result.component_image(),
                                        result.offset, result.shape, result.affine))
        return out


def error_row(scan: Scan, reason: str, stage: str) -> dict:
    """An errors.tsv row; the reason names the file as given in the input, never the machine's
    resolved path."""
    reason = scan.shown(reason)
    if scan.source and scan.source not in reason and (not scan.mask or scan.mask not in reason):
        shown = "" if scan.source == scan.mask else f" ({scan.mask or 'no mask'})"
        reason = f"{scan.source}{shown}: {reason}"
    return {"subject": scan.subject, "session": scan.session, "path": scan.mask,
            "stage": stage, "reason": reason}


def run_volumes(input_path: str | Path, out: Path, *, config: Config, workers: int = 1,
                scheduler: str | None = None, progress: Callable[[int, int], None] | None = None,
                use_cache: bool = True, write: bool = True,
                inputs: tuple[list[Scan], str] | None = None) -> Stage1:
    """Stage 1 over every scan of INPUT; writes lesions.tsv, masks.tsv and errors.tsv.

    With ``write=False`` nothing is written. ``inputs`` are the scans and kind of INPUT when
    the caller has read them already (to refuse a bad input before it marks OUT in progress).
    """
    if scheduler is None:
        start_pool_server(workers)      # its imports overlap the reading of the inputs
    scans, kind = inputs or read_inputs(input_path, desc=config.volumes.desc)
    stage = Stage1(scans=scans, kind=kind)
    for scan in scans:
        if scan.error:
            stage.errors.append(error_row(scan, scan.error, "input"))
    todo = [s for s in scans if not s.error]
    cache_dir = str(out / ".cache" / "volumes") if use_cache else None
    digest = f"{__version__}|{config.digest('volumes')}"
    earlier = _entries(cache_dir)
    tasks = [(volumes_task, (s.subject, s.session, str(s.mask_path), s.labels, config.volumes,
                             cache_dir, digest)) for s in todo]
    if progress:
        progress(0, len(tasks))
    for done, (index, result) in enumerate(run_tasks(tasks, workers=workers,
                                                     scheduler=scheduler), start=1):
        scan = todo[index]
        stage.results[scan.key] = result.compact()    # one dense image at a time in memory
        stage.reused += bool(result.cached and _entry(result, digest, scan) in earlier)
        if not result.ok:
            stage.errors.append(error_row(scan, result.error, "volumes"))
        elif scan.image_path is not None:
            from pipeline.inputs.check import image_grid_problem

            problem = image_grid_problem(result.shape, result.affine, scan.image_path)
            if problem:      # the lesions are still measured; the overlay cannot be drawn
                stage.errors.append(error_row(scan, problem, "image"))
        if progress:
            progress(done, len(tasks))
    stage.lesions, stage.masks = _stage1_tables(stage)
    if write:
        write_stage1(stage, out)
    return stage


def _entries(cache_dir: str | None) -> set[str]:
    """Names of the cache entries present before this run (a scan whose content repeats
    another scan of the same run hits an entry too, but is not reused from an earlier run)."""
    import os

    return set(os.listdir(cache_dir)) if cache_dir and os.path.isdir(cache_dir) else set()


def _entry(result: ScanResult, digest: str, scan: Scan) -> str:
    from pipeline.run.cache import cache_key

    return f"{cache_key(result.sha256, digest, scan.labels)}.npz"


def _stage1_tables(stage: Stage1) -> tuple[pd.DataFrame, pd.DataFrame]:
    """lesions.tsv and masks.tsv rows, built column by column from every scan's measures (one
    DataFrame in the end, not one per scan: a batch of thousands of scans stays quick here)."""
    import numpy as np

    from pipeline.volumes.components import MEASURE_COLUMNS

    parts, ident, mask_rows = [], [], []
    for scan in sorted(stage.scans, key=lambda s: (s.subject, s.day, s.session)):
        result = stage.results.get(scan.key)
        if scan.error or result is None or not result.ok:
            continue
        columns = result.columns
        parts.append(columns)
        ident.append((scan.subject, scan.session, float(scan.day), scan.mask, scan.group))
        mask_rows.append({"subject": scan.subject, "session": scan.session, "day": scan.day,
                          "mask": scan.mask, "image": scan.image, "group": scan.group,
                          "components": len(columns["component"]),
                          "volume_mm3": float(np.sum(columns["volume_mm3"])),
                          "voxel_volume_mm3": voxel_volume_mm3(result.affine),
                          "shape_x": result.shape[0], "shape_y": result.shape[1],
                          "shape_z": result.shape[2], "sha256": result.sha256,
                          "track_image": track_path(Path(), scan.subject, scan.session).as_posix()})
    if not parts:
        return pd.DataFrame(columns=list(LESION_COLUMNS)), \
            pd.DataFrame(mask_rows, columns=list(MASK_COLUMNS))
    counts = [len(p["component"]) for p in parts]
    data = {}
    for position, name in enumerate(("subject", "session", "day", "mask", "group")):
        values = np.empty(len(ident), dtype=float if name == "day" else object)
        values[:] = [row[position] for row in ident]
        data[name] = np.repeat(values, counts)
    for name in MEASURE_COLUMNS:
        data[name] = np.concatenate([p[name] for p in parts])
    lesions = pd.DataFrame(data, columns=list(LESION_COLUMNS))
    return lesions, pd.DataFrame(mask_rows, columns=list(MASK_COLUMNS))


def write_stage1(stage: Stage1, out: Path) -> None:
    out.mkdir(parents=True, exist_ok=True)
    write_output(out, "lesions.tsv", stage.lesions)
    write_output(out, "masks.tsv", stage.masks)
    write_errors(stage.errors, out)


def write_errors(errors: list[dict], out: Path) -> None:
    table = pd.DataFrame(errors, columns=list(ERROR_COLUMNS))
    table = table.sort_values(["subject", "session", "stage"], kind="stable")
    write_output(out, "errors.tsv", table)


def read_errors(out: Path) -> list[dict]:
    from pipeline.io.tsv import read_table

    path = out / "errors.tsv"
    if not path.exists():
        return []
    return read_table(path).to_dict("records")


def write_json(path: Path, data: dict) -> None:
    from pipeline.io.tsv import write_text

    write_text(path, json.dumps(data, indent=2, default=str) + "\n")
