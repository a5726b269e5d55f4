"""Steps the commands of ``workflow`` share around the stages: marking OUT as being replaced,
the provenance a later command adds, the run's summary counts and input warnings."""
from __future__ import annotations

import json
from datetime import UTC, datetime
from pathlib import Path

from pipeline.run import state as run_state
from pipeline.config import Config
from pipeline.run.stage1 import Stage1, say, write_json


def begin_replacing(out: Path, command: str, stages: tuple[str, ...]) -> str:
    """Mark OUT as in progress, then remove what describes the run whose tables are about to
    be replaced (provenance.json, report.html): an interrupted run never leaves them behind."""
    run = run_state.begin(out, command, stages)
    for name in ("provenance.json", "report.html"):
        (out / name).unlink(missing_ok=True)
    return run


def failed_text(stage: Stage1) -> str:
    """'N failed' counting input rows (a refused duplicated session is two rows), plus the
    scans whose lesions were measured but whose image cannot be used."""
    failed = sum(1 for e in stage.errors if e["stage"] != "image")
    images = len(stage.errors) - failed
    return f"{failed} failed" + (f", {images} with an unusable image" if images else "")


def warn_repeated_masks(stage: Stage1) -> None:
    from pipeline.inputs.shared_masks import repeated_masks

    shas = {key: r.sha256 for key, r in stage.results.items()
            if r.ok and r.columns is not None and len(r.columns["component"])}
    for subject, _, message in repeated_masks(stage.scans, shas):
        say(f"warning: sub {subject}: {message}")


def input_record(out: Path, input: Path, kind: str, stage: Stage1 | None) -> dict:
    """The input as given, where it lies relative to OUT (so later commands find it from any
    folder) and a digest of the scans it lists (so they notice when it changed)."""
    from pipeline.run.recorded import location_from_out, scans_digest

    record = {"path": str(input), "kind": kind,
              "path_from_out": location_from_out(out, input)}
    if stage is not None:
        record["scans_sha256"] = scans_digest(stage.scans)
    return record


def update_provenance(out: Path, *, config: Config, sections: tuple[str, ...],
                      files: dict[str, Path | None]) -> None:
    """After ``match``/``fit``/``evaluate``: the settings and files that command used, and
    which run wrote each stage."""
    path = out / "provenance.json"
    if not path.is_file():
        return
    data = json.loads(path.read_text(encoding="utf-8"))
    for name in sections:
        data.setdefault("configuration", {})[name] = config.as_dict()[name]
    known = data.setdefault("files", {})
    for name, value in files.items():
        known.pop(name, None)
        if value is not None:
            digest = run_state.sha256(Path(value)) if Path(value).is_file() else None
            known[name] = {"path": str(value), "sha256": digest}
    data["stages"] = run_state.run_ids(out)
    data["updated"] = datetime.now(UTC).isoformat(timespec="seconds")
    write_json(path, data)


def drop_report(out: Path) -> bool:
    """Whether OUT had a report, which is removed now (it would show tables being replaced)."""
    had = (out / "report.html").exists()
    (out / "report.html").unlink(missing_ok=True)
    return had
