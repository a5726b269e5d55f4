"""What each command does, end to end: stages in order, outputs written, status returned."""
from __future__ import annotations

import fcntl
import json
import math
import time
import sys
from collections.abc import Iterator
from contextlib import contextmanager
from datetime import UTC, datetime
from pathlib import Path

import pandas as pd

from pipeline import DISCLAIMER, __version__
from pipeline.config import Config
from pipeline.errors import UsageError
from pipeline.inputs.manifest import read_inputs
from pipeline.run.stages import events_table
from pipeline.run import state as run_state
from pipeline.run.steps import (begin_replacing, drop_report, failed_text, input_record,
                                update_provenance, warn_repeated_masks)
from pipeline.run.stage1 import Stage1, read_errors, run_volumes, say, write_errors, write_json


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
    warn_repeated_masks(stage)
    warned = sum(1 for r in stage.results.values() if r.warnings)
    if warned:
        say(f"note: {warned} mask(s) have header warnings (e.g. unknown units, sform/qform "
            "disagreement); 'lesion-growth check INPUT' lists them")


def volumes_only(input: Path, out: Path, *, config: Config, config_path: Path | None = None,
                 workers: int = 1, scheduler: str | None = None, quiet: bool = False) -> int:
    started = _now()
    with locked(out):
        scans = read_inputs(input, desc=config.volumes.desc)    # usage errors first
        run = begin_replacing(out, "volumes", ("volumes",))
        stage = run_volumes(input, out, config=config, workers=workers, scheduler=scheduler,
                            progress=Progress("masks", quiet=quiet), inputs=scans)
        run_state.stage_done(out, run, "volumes")
        _report_stage1(stage)
        write_provenance(out, input=input, kind=stage.kind, config=config,
                         config_path=config_path, stage=stage, started=started)
        run_state.finish(out, run)
    ok = len(stage.results) - sum(1 for r in stage.results.values() if not r.ok)
    say(f"wrote {out / 'lesions.tsv'}: {len(stage.lesions)} lesion components from {ok} masks; "
        f"{failed_text(stage)} (see errors.tsv)")
    if (out / "longitudinal.tsv").exists():
        say("note: matches.tsv, longitudinal.tsv and fits.tsv in this folder are from before; "
            "run 'lesion-growth match' and 'fit' next")
    return 1 if stage.errors else 0


def check_inputs(input: Path, *, config: Config) -> int:
    """``lesion-growth check``: one line per problem on stdout; nothing written."""
    from pipeline.inputs.manifest import read_inputs
    from pipeline.inputs.check import check_scan

    scans, kind = read_inputs(input, desc=config.volumes.desc)
    failed = 0
    print("level\tsubject\tsession\tpath\tcode\tmessage")
    for scan in scans:
        problems = check_scan(scan, settings=config.volumes)
        failed += any(p.level == "error" for p in problems)
        for p in problems:
            print(f"{p.level}\t{p.subject}\t{p.session}\t{p.path}\t{p.code}\t{p.message}")
    from pipeline.inputs.shared_masks import repeated_masks

    for subject, members, message in repeated_masks(scans):
        for scan in members:
            print(f"warning\t{subject}\t{scan.session}\t{scan.mask}\tsame-mask\t{message}")
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
            entry = {"subject": scan.subject, "session": scan.session,
                     "mask": scan.extra.get("mask_given", scan.mask),
                     "mask_sha256": result.sha256 if result is not None and result.ok else None}
            if scan.image:
                entry["image"] = scan.extra.get("image_given", scan.image)
                entry["image_sha256"] = _maybe_sha(scan.image_path)
            inputs.append(entry)
    files = {"input": input if kind == "manifest" else None, "configuration": config_path}
    files.update(extra_files or {})
    data = {
        "tool": {"name": "lesion-growth", "version": __version__},
        "disclaimer": DISCLAIMER,
        "input": input_record(out, input, kind, stage),
        "files": {k: {"path": str(v), "sha256": _maybe_sha(Path(v))}
                  for k, v in files.items() if v is not None},
        "configuration": config.as_dict(),
        "conventions": {"world": "RAS+ mm from the NIfTI header (sform, else qform)",
                        "connectivity": config.volumes.connectivity,
                        "time": "days from each subject's first session"},
        "scans": inputs,
        "started": started,
        "finished": _now(),
        "stages": run_state.run_ids(out),
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


def _read_corrections(path: Path | None) -> pd.DataFrame | None:
    from pipeline.io.tsv import read_table

    if path is None:
        return None
    if not Path(path).is_file():
        raise UsageError(f"{path}: corrections file not found")
    table = read_table(path, text_columns=("subject", "session", "lesion", "note"))
    missing = [c for c in ("subject", "session", "component", "lesion") if c not in table.columns]
    if missing:
        raise UsageError(f"{path}: corrections table lacks column(s) {', '.join(missing)}")
    return table


def _events(path: Path | None, stage: Stage1, errors: list[dict],
            out: Path | None = None) -> pd.DataFrame | None:
    from pipeline.inputs.manifest import subject_origins
    from pipeline.run.stages import read_events

    if path is None:
        return None
    lesions = None
    if out is not None and (out / "longitudinal.tsv").exists():
        from pipeline.io.tsv import read_table

        tracks = read_table(out / "longitudinal.tsv")
        lesions = set(zip(tracks.subject, tracks.lesion.astype(int)))
    kinds = {s.extra.get("kind", "date") for s in stage.scans}
    spans: dict[str, tuple[float, float]] = {}
    for s in stage.scans:
        if math.isfinite(s.day):
            low, high = spans.get(s.subject, (s.day, s.day))
            spans[s.subject] = (min(low, s.day), max(high, s.day))
    warnings: list[str] = []
    events, problems = read_events(Path(path), subject_origins(stage.scans),
                                   {s.subject for s in stage.scans}, lesions,
                                   manifest_kind="day" if kinds == {"day"} else "date",
                                   follow_up=spans, warnings=warnings)
    errors.extend(problems)
    for row in problems:
        say(f"error: sub {row['subject']}: {row['reason']}" if row["subject"]
            else f"error: {row['reason']}")
    for line in warnings:
        say(f"warning: {line}")
    return events


def _remove_stale_temporaries(out: Path) -> None:
    """Delete temporary files of atomic writes that a killed run left (``.<stem>.<random><suffix>``,
    see pipeline.io.tsv.atomic_path); only called while holding OUT's lock."""
    import re

    pattern = re.compile(r"^\.[^.]+\.[a-z0-9_]{8}\.")
    for folder in (out, out / "tracks", out / ".cache" / "volumes", out / "report",
                   out / ".cache" / "report"):
        if folder.is_dir():
            for path in folder.iterdir():
                if path.is_file() and pattern.match(path.name) and path.name != ".lock":
                    path.unlink()


def _later_stages(stage: Stage1, out: Path, *, config: Config, events: Path | None,
                  corrections: pd.DataFrame | None, corrections_path: Path | None, run: str,
                  workers: int = 1) -> tuple[list[dict], dict[str, Path | None]]:
    """Stages 2 and 3 after stage 1; returns new error rows and files used."""
    errors = _match_stage(stage, out, config=config, corrections=corrections,
                          corrections_path=corrections_path, run=run, workers=workers)
    _fit_stage(out, config=config, events=_events(events, stage, errors, out), run=run)
    return errors, {"events": events, "corrections": corrections_path}


def _match_stage(stage: Stage1, out: Path, *, config: Config,
                 corrections: pd.DataFrame | None, corrections_path: Path | None,
                 run: str, workers: int = 1) -> list[dict]:
    """Stage 2, with the track images and registrations of an earlier match removed first (a
    smaller input must not leave the images of subjects it no longer holds)."""
    from pipeline.run.stages import run_matching

    if (out / "tracks").is_dir():
        for path in (out / "tracks").iterdir():
            if path.is_file() and path.name.endswith((".nii", ".nii.gz")):
                path.unlink()
    (out / "registration.tsv").unlink(missing_ok=True)
    errors = run_matching(stage, out, config=config, corrections=corrections,
                          corrections_path=corrections_path, workers=workers)
    run_state.stage_done(out, run, "match")
    return errors


def _fit_stage(out: Path, *, config: Config, events: pd.DataFrame | None, run: str) -> None:
    from pipeline.run.stages import run_fitting

    if events is None:
        (out / "events.tsv").unlink(missing_ok=True)    # no events: no phases from before
    run_fitting(out, config=config, events=events)
    run_state.stage_done(out, run, "fit")


def run_all(input: Path, out: Path, *, config: Config, config_path: Path | None = None,
            events: Path | None = None, corrections: Path | None = None, workers: int = 1,
            scheduler: str | None = None, quiet: bool = False, report: bool = True) -> int:
    """``lesion-growth run``: every stage, every output; provenance.json is written last.

    ``report=False`` leaves the report to the caller (the demo builds it once, after
    ``evaluate``)."""
    started = _now()
    table = _read_corrections(corrections)          # usage errors before any work
    if events is not None:
        events_table(events)                          # usage errors before any work
    with locked(out):
        _remove_stale_temporaries(out)
        scans = read_inputs(input, desc=config.volumes.desc)    # usage errors first
        run = begin_replacing(out, "run", ("volumes", "match", "fit"))
        stage = run_volumes(input, out, config=config, workers=workers, scheduler=scheduler,
                            progress=Progress("masks", quiet=quiet), inputs=scans)
        run_state.stage_done(out, run, "volumes")
        _report_stage1(stage)
        provenance = dict(input=input, kind=stage.kind, config=config, config_path=config_path,
                          stage=stage, started=started)
        write_provenance(out, **provenance)      # later commands can build on stage 1 now
        errors, files = _later_stages(stage, out, config=config, events=events,
                                      corrections=table, corrections_path=corrections, run=run,
                                      workers=workers)
        write_errors(stage.errors + errors, out)
        write_dataset_description(out)
        write_provenance(out, **provenance, extra_files=files)    # before the report reads it
        page = _report(out, config) if report else None
        run_state.finish(out, run)
    _final_lines(out, stage, errors, page)
    return 1 if stage.errors or errors or (report and page is None) else 0


def _report(out: Path, config: Config) -> Path | None:
    """Write report.html; a failure here must not lose the tables already written."""
    from pipeline.report.build import write_report

    try:
        return write_report(out, settings=config.report,
                            out_of_date=run_state.problems(out, "report"))
    except Exception as exc:  # the report is the last step; keep its failure to one line
        say(f"error: report.html could not be written ({type(exc).__name__}: {exc}); the tables "
            "in the output folder are complete")
        return None


def _refresh_report(out: Path, config: Config) -> None:
    """Rewrite report.html after a partial rerun, so the page never shows stale tables."""
    if (out / "report.html").exists():
        path = _report(out, config)
        if path is not None:
            say(f"report updated: {path}")


def _final_lines(out: Path, stage: Stage1, errors: list[dict], report: Path | None) -> None:
    scans = len(stage.scans)
    same = sum(1 for r in stage.results.values() if r.cached) - stage.reused
    say(f"processed {scans} scans ({stage.recomputed} computed, {stage.reused} reused from an "
        "earlier run" + (f", {same} identical to another scan of this run" if same else "")
        + f"); {failed_text(stage)}"
        + (f", {len(errors)} later-stage problem(s)" if errors else ""))
    say(f"wrote lesions.tsv, masks.tsv, matches.tsv, longitudinal.tsv, fits.tsv, group_fits.tsv, "
        f"tracks/, errors.tsv, provenance.json in {out}")
    if report is not None:
        say(f"report: {report}")
    say(DISCLAIMER)


def _recorded(out: Path, stage: str) -> dict:
    """provenance.json of the run stage ``stage`` builds on, after checking that the tables
    it reads come from one finished run (UsageError naming the table and what to rerun)."""
    from pipeline.run.stages import load_provenance

    if not out.is_dir():
        raise UsageError(f"{out}: output folder not found")
    run_state.require(out, stage)
    provenance = load_provenance(out)
    if run_state.read_state(out) is None:
        say(f"note: {out} has no record of which run wrote its tables (an older version wrote "
            "it); they are taken as one set")
    return provenance


def _keep_errors(out: Path, stages: tuple[str, ...]) -> list[dict]:
    return [e for e in read_errors(out) if e.get("stage") not in stages]


def match_only(out: Path, *, config: Config, corrections: Path | None = None,
               workers: int = 1) -> int:
    """``lesion-growth match OUT``: stage 2 again (e.g. after QA corrections), on stage 1 as
    recorded (refused when an input changed since)."""
    from pipeline.run.recorded import recorded_stage1

    with locked(out):
        table = _read_corrections(corrections)
        provenance = _recorded(out, "match")
        stage = recorded_stage1(out, provenance, check_images=config.matching.register)
        if corrections is None and "corrections" in provenance.get("files", {}):
            say(f"note: no --corrections: the automatic result (the earlier match used "
                f"{provenance['files']['corrections']['path']})")
        run = run_state.begin(out, "match", ("match",))
        had_report = drop_report(out)
        errors = _match_stage(stage, out, config=config, corrections=table,
                              corrections_path=corrections, run=run, workers=workers)
        kept = _keep_errors(out, ("match",))
        write_errors(kept + errors, out)
        update_provenance(out, config=config, sections=("matching",),
                          files={"corrections": corrections})
        run_state.finish(out, run)
        if had_report:
            _refresh_report(out, config)
    say(f"wrote matches.tsv, longitudinal.tsv and tracks/ in {out}"
        + (f" (with corrections from {corrections})" if corrections else "")
        + "; fits.tsv is from before: run 'lesion-growth fit' next")
    return 1 if kept or errors else 0


def fit_only(out: Path, *, config: Config, events: Path | None = None) -> int:
    """``lesion-growth fit OUT``: stage 3 again on longitudinal.tsv."""
    from pipeline.run.recorded import recorded_scans

    if not (out / "longitudinal.tsv").exists():
        raise UsageError(f"{out}: no longitudinal.tsv; run 'lesion-growth match' or 'run' first")
    if events is not None:
        events_table(events)                          # usage errors before any work
    with locked(out):
        provenance = _recorded(out, "fit")
        errors: list[dict] = []
        table = None
        if events is not None:
            stage = Stage1(scans=recorded_scans(out, provenance), kind="")
            table = _events(events, stage, errors, out)
        elif "events" in provenance.get("files", {}):
            say(f"note: no --events: fitting without phases (the earlier fit used "
                f"{provenance['files']['events']['path']})")
        run = run_state.begin(out, "fit", ("fit",))
        had_report = drop_report(out)
        _fit_stage(out, config=config, events=table, run=run)
        kept = _keep_errors(out, ("events", "fit"))
        write_errors(kept + errors, out)
        update_provenance(out, config=config, sections=("fitting",), files={"events": events})
        run_state.finish(out, run)
        if had_report:
            _refresh_report(out, config)
    say(f"wrote fits.tsv and group_fits.tsv in {out}")
    return 1 if kept or errors else 0


def report_only(out: Path, *, config: Config) -> int:
    """``lesion-growth report OUT`` (under OUT's lock: never while a run changes the tables);
    tables of different runs are named on stderr and on the page."""
    if not out.is_dir():
        raise UsageError(f"{out}: output folder not found")
    with locked(out):
        for problem in run_state.problems(out, "report"):
            say(f"warning: {out}: {problem}")
        path = _report(out, config)
    if path is None:
        return 1
    say(f"report: {path}")
    say(DISCLAIMER)
    return 0


def evaluate_only(out: Path, outcomes: Path, *, figures: tuple[str, ...], phase: str | None,
                  model: str, positive: str | None, source: str = "fits",
                  config: Config = Config()) -> int:
    """``lesion-growth evaluate``: evaluation.tsv (+ evaluation_thresholds.tsv); ``source``
    'population' evaluates the population model's individual estimates instead of fits.tsv."""
    from pipeline.growth import evaluate
    from pipeline.io.tsv import read_table
    from pipeline.run.catalog import write_output

    name = {"fits": "fits.tsv", "population": "population_lesions.tsv"}.get(source)
    if name is None:
        raise UsageError(f"--source must be 'fits' or 'population', got {source!r}")
    if not (out / name).exists():
        raise UsageError(f"{out}: no {name}; run 'lesion-growth fit' or 'run' first")
    if not Path(outcomes).is_file():
        raise UsageError(f"{outcomes}: outcomes file not found")
    with locked(out):
        run_state.require(out, "evaluate")
        fits = read_table(out / name)
        table = read_table(outcomes, text_columns=("subject", "outcome"))
        tracks = out / "longitudinal.tsv"
        known = set((read_table(tracks) if tracks.exists() else fits)["subject"].astype(str))
        table, problems = evaluate.unknown_subjects(table, known, name=Path(outcomes).name)
        for row in problems:
            say(f"error: sub {row['subject']}: {row['reason']}")
        try:
            result = evaluate.evaluate_marker(fits, table, figures=figures, phase=phase,
                                              model=model, positive=positive,
                                              n_boot=config.evaluate.bootstrap,
                                              seed=config.evaluate.seed,
                                              confidence=config.evaluate.confidence)
            thresholds = evaluate.threshold_table(fits, table, figures=figures, phase=phase,
                                                  model=model, positive=positive)
        except ValueError as exc:
            raise UsageError(f"{outcomes}: {exc}") from None
        run = run_state.begin(out, "evaluate", ("evaluate",))
        write_output(out, "evaluation.tsv", result)
        write_output(out, "evaluation_thresholds.tsv", thresholds)
        if problems or (out / "errors.tsv").exists():
            write_errors(_keep_errors(out, ("evaluate",)) + problems, out)
        run_state.stage_done(out, run, "evaluate")
        run_state.finish(out, run)
    say(f"wrote evaluation.tsv in {out}")
    return 1 if problems else 0


def run_demo(out: Path, *, workers: int = 1, quiet: bool = False, subjects: int = 12) -> int:
    """``lesion-growth demo OUT``: invent the demo cohort under OUT/inputs and run everything."""
    from pipeline.config import load_config
    from pipeline.demo.cohort import make_demo_inputs

    t0 = time.perf_counter()
    demo = make_demo_inputs(out / "inputs", n_subjects=subjects)
    say(f"demo cohort (invented) written to {out / 'inputs'} in {time.perf_counter() - t0:.1f} s")
    code = run_all(demo.manifest, out, config=load_config(None), events=demo.events,
                   workers=workers, quiet=quiet, report=False)
    evaluate_only(out, demo.outcomes, figures=("beta",), phase="untreated", model="power",
                  positive="progression")
    page = _report(out, load_config(None))
    planted = {(e["subject"], e["session"]) for e in
               json.loads(Path(demo.truth).read_text())["expected"]["errors"]}
    found = {(e["subject"], e["session"]) for e in read_errors(out)}
    broken = f"; errors.tsv lists the deliberately broken scan(s) {sorted(planted)}" \
        if planted else ""
    say(f"demo finished in {time.perf_counter() - t0:.1f} s{broken}; open {out / 'report.html'}")
    if page is None:
        return 1          # the tables are complete; the report is not
    if code == 1 and found == planted:
        return 0          # only the planted failure: the demo did what it should
    return code
