"""What each command does, end to end: stages in order, outputs written, status returned."""
from __future__ import annotations

import fcntl
import sys
from collections.abc import Iterator
from contextlib import contextmanager
from datetime import UTC, datetime
from pathlib import Path

from pipeline import DISCLAIMER, __version__
from pipeline.config import Config
from pipeline.errors import UsageError
from pipeline.runner import Stage1, run_volumes, say, write_json


@contextmanager
def locked(out: Path) -> Iterator[None]:
    """Refuse a second run on the same OUT while one is running (the lock dies with its process)."""
    out.mkdir(parents=True, exist_ok=True)
    handle = open(out / ".lock", "w")
    try:
        fcntl.flock(handle, fcntl.LOCK_EX | fcntl.LOCK_NB)
    except BlockingIOError:
        handle.close()
        raise UsageError(f"{out}: another lesion-growth run is using this folder; wait for it "
                         "or choose another -o") from None
    try:
        yield
    finally:
        fcntl.flock(handle, fcntl.LOCK_UN)
        handle.close()


class Progress:
    """A progress bar on a terminal's stderr; silent in a pipe or with --quiet."""

    def __init__(self, label: str, *, quiet: bool) -> None:
        self.enabled = not quiet and sys.stderr.isatty()
        self.label = label
        self._bar = None

    def __call__(self, done: int, total: int) -> None:
        if not self.enabled:
            return
        if self._bar is None:
            from rich.console import Console
            from rich.progress import BarColumn, MofNCompleteColumn, TimeRemainingColumn
            from rich.progress import Progress as Bar

            self._bar = Bar("{task.description}", BarColumn(), MofNCompleteColumn(),
                            TimeRemainingColumn(), console=Console(stderr=True), transient=True)
            self._bar.start()
            self._task = self._bar.add_task(self.label, total=total)
        self._bar.update(self._task, completed=done, total=total)
        if done >= total:
            self._bar.stop()


def _report_stage1(stage: Stage1) -> None:
    for row in stage.errors:
        say(f"error: sub {row['subject']} ses {row['session']}: {row['reason']}")
    warned = sum(1 for r in stage.results.values() if r.warnings)
    if warned:
        say(f"note: {warned} mask(s) have header warnings (e.g. unknown units, sform/qform "
            "disagreement); 'lesion-growth check INPUT' lists them")


def volumes_only(input: Path, out: Path, *, config: Config, config_path: Path | None = None,
                 workers: int = 1, scheduler: str | None = None, quiet: bool = False) -> int:
    started = _now()
    with locked(out):
        stage = run_volumes(input, out, config=config, workers=workers, scheduler=scheduler,
                            progress=Progress("masks", quiet=quiet))
        _report_stage1(stage)
        write_provenance(out, input=input, kind=stage.kind, config=config,
                         config_path=config_path, stage=stage, started=started)
    ok = len(stage.results) - sum(1 for r in stage.results.values() if not r.ok)
    say(f"wrote {out / 'lesions.tsv'}: {len(stage.lesions)} lesion components from {ok} masks; "
        f"{len(stage.errors)} failed (see errors.tsv)")
    return 1 if stage.errors else 0


def check_inputs(input: Path, *, config: Config) -> int:
    """``lesion-growth check``: one line per problem on stdout; nothing written."""
    from pipeline.inputs import read_inputs
    from pipeline.qc import check_scan

    scans, kind = read_inputs(input, desc=config.volumes.desc)
    failed = 0
    print("level\tsubject\tsession\tpath\tcode\tmessage")
    for scan in scans:
        problems = check_scan(scan, settings=config.volumes)
        failed += any(p.level == "error" for p in problems)
        for p in problems:
            print(f"{p.level}\t{p.subject}\t{p.session}\t{p.path}\t{p.code}\t{p.message}")
    say(f"checked {len(scans)} scans from {kind} input: {len(scans) - failed} usable, "
        f"{failed} not usable")
    return 1 if failed else 0


def _now() -> str:
    return datetime.now(UTC).isoformat(timespec="seconds")


def sha256_file(path: Path) -> str:
    import hashlib

    with open(path, "rb") as handle:
        return hashlib.file_digest(handle, "sha256").hexdigest()


def write_provenance(out: Path, *, input: Path, kind: str, config: Config,
                     config_path: Path | None, stage: Stage1 | None, started: str,
                     extra_files: dict[str, Path | None] | None = None) -> None:
    """provenance.json: version, configuration, every input's path (as given) and SHA-256."""
    inputs = []
    if stage is not None:
        for scan in stage.scans:
            result = stage.results.get(scan.key)
            entry = {"subject": scan.subject, "session": scan.session, "mask": scan.mask,
                     "mask_sha256": result.sha256 if result is not None and result.ok else None}
            if scan.image:
                entry["image"] = scan.image
                entry["image_sha256"] = _maybe_sha(scan.image_path)
            inputs.append(entry)
    files = {"input": input if kind == "manifest" else None, "configuration": config_path}
    files.update(extra_files or {})
    data = {
        "tool": {"name": "lesion-growth", "version": __version__},
        "disclaimer": DISCLAIMER,
        "input": {"path": str(input), "kind": kind},
        "files": {k: {"path": str(v), "sha256": _maybe_sha(Path(v))}
                  for k, v in files.items() if v is not None},
        "configuration": config.as_dict(),
        "conventions": {"world": "RAS+ mm from the NIfTI header (sform, else qform)",
                        "connectivity": config.volumes.connectivity,
                        "time": "days from each subject's first session"},
        "scans": inputs,
        "started": started,
        "finished": _now(),
    }
    write_json(out / "provenance.json", data)


def _maybe_sha(path: Path | None) -> str | None:
    if path is None or not Path(path).is_file():
        return None
    return sha256_file(Path(path))


def write_dataset_description(out: Path) -> None:
    """BIDS derivative dataset_description.json in OUT."""
    write_json(out / "dataset_description.json", {
        "Name": "lesion-growth outputs", "BIDSVersion": "1.10.0", "DatasetType": "derivative",
        "GeneratedBy": [{"Name": "lesion-growth", "Version": __version__,
                         "Description": "Lesion volumes, tracks and growth-law fits. "
                                        + DISCLAIMER}]})
