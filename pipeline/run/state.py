"""Which run wrote which table of OUT, so that tables of different runs are never mixed silently.

``OUT/.run-state.json`` is written before a command changes anything in OUT (it names the
command in progress and marks every stage it reruns, and every stage downstream of it, as not
current), and after each stage it records that stage's run id and the SHA-256 of every table it
wrote. A later command checks the chain it builds on: each stage present, written after the stage
it depends on, and its tables unchanged since. Only commands holding OUT's lock write the file.

Examples
--------
>>> import tempfile
>>> out = Path(tempfile.mkdtemp())
>>> run = begin(out, "volumes", ("volumes",))
>>> _ = (out / "lesions.tsv").write_text("subject\\n"), (out / "masks.tsv").write_text("x\\n")
>>> stage_done(out, run, "volumes"); finish(out, run)
>>> problems(out, "match")
[]
>>> problems(out, "fit")                 # match never ran: nothing to mix
[]
>>> _ = (out / "longitudinal.tsv").write_text("left by an earlier run")
>>> problems(out, "fit")[0]
'longitudinal.tsv is not from the current stage 1 (match has not been run since stage 1 ran)'
"""
from __future__ import annotations

import hashlib
import json
import uuid
from datetime import UTC, datetime
from pathlib import Path

from pipeline.errors import UsageError
from pipeline.io.atomic import write_text

STATE = ".run-state.json"
#: Stages in order; each one builds on the one before it.
STAGES = ("volumes", "match", "fit", "evaluate")
#: Tables each stage writes (checked by SHA-256; a table the stage did not write is skipped).
FILES = {"volumes": ("lesions.tsv", "masks.tsv"),
         "match": ("matches.tsv", "longitudinal.tsv", "registration.tsv"),
         "fit": ("fits.tsv", "group_fits.tsv", "unfitted.tsv", "events.tsv", "response.tsv",
                 "response_subjects.tsv", "population_fits.tsv", "population_lesions.tsv",
                 "group_contrasts.tsv", "backtest.tsv"),
         "evaluate": ("evaluation.tsv", "evaluation_thresholds.tsv")}
#: What to run to bring each stage up to date.
REMEDY = {"volumes": "rerun 'lesion-growth run' (or 'volumes') on the input",
          "match": "run 'lesion-growth match OUT' (then 'fit')",
          "fit": "run 'lesion-growth fit OUT'",
          "evaluate": "run 'lesion-growth evaluate OUT'"}
_MAIN = {"volumes": "lesions.tsv", "match": "longitudinal.tsv", "fit": "fits.tsv",
         "evaluate": "evaluation.tsv"}


def _now() -> str:
    return datetime.now(UTC).isoformat(timespec="seconds")


def read_state(out: Path) -> dict | None:
    """The state of OUT, or None when OUT has none (written by an older version or by hand)."""
    path = Path(out) / STATE
    if not path.is_file():
        return None
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return {"stages": {}, "running": None, "unreadable": True}
    return data if isinstance(data, dict) else {"stages": {}, "running": None}


def _write(out: Path, state: dict) -> None:
    write_text(Path(out) / STATE, json.dumps(state, indent=2) + "\n")


def downstream(stages: tuple[str, ...]) -> tuple[str, ...]:
    """``stages`` and every stage after the first of them.

    >>> downstream(("match",))
    ('match', 'fit', 'evaluate')
    """
    first = min(STAGES.index(s) for s in stages)
    return STAGES[first:]


def begin(out: Path, command: str, stages: tuple[str, ...]) -> str:
    """Mark OUT as changed by ``command`` (which reruns ``stages``); returns the run id. Must be
    called before anything in OUT is changed."""
    state = read_state(out) or {}
    run = uuid.uuid4().hex[:12]
    entries = state.get("stages", {}) if isinstance(state.get("stages"), dict) else {}
    for name in downstream(stages):
        if name in entries:
            entries[name]["current"] = False
            entries[name]["stale_because"] = f"'{command}' (run {run}) reran " \
                f"{', '.join(stages)}"
    _write(out, {"format": 1, "running": {"run": run, "command": command, "started": _now(),
                                         "stages": list(stages)},
                 "stages": entries, "last_finished": state.get("last_finished")})
    return run


def sha256(path: Path) -> str:
    with open(path, "rb") as handle:
        return hashlib.file_digest(handle, "sha256").hexdigest()


def stage_done(out: Path, run: str, stage: str) -> None:
    """Record that ``stage`` of run ``run`` wrote its tables (with their SHA-256)."""
    state = read_state(out) or {"stages": {}}
    entries = state.setdefault("stages", {})
    before = STAGES[STAGES.index(stage) - 1] if STAGES.index(stage) else None
    files = {name: sha256(Path(out) / name) for name in FILES[stage]
             if (Path(out) / name).is_file()}
    entries[stage] = {"run": run, "finished": _now(), "current": True, "files": files,
                      "after": entries.get(before, {}).get("run") if before else None}
    _write(out, state)


def finish(out: Path, run: str) -> None:
    """The command of run ``run`` finished: OUT is no longer in progress."""
    state = read_state(out) or {"stages": {}}
    running = state.get("running") or {}
    if running.get("run") == run:
        state["last_finished"] = {**running, "finished": _now()}
        state["running"] = None
        _write(out, state)


def run_ids(out: Path) -> dict[str, str]:
    """Run id of every current stage (for provenance.json)."""
    state = read_state(out) or {}
    return {name: entry.get("run") for name, entry in state.get("stages", {}).items()
            if entry.get("current")}


def problems(out: Path, stage: str) -> list[str]:
    """Why the tables ``stage`` builds on (its upstream chain, and ``stage`` itself for
    ``report``-like readers) are not one consistent set; empty when they are, or when OUT
    has no state at all (older OUT: nothing to compare)."""
    state = read_state(out)
    if state is None:
        return []
    if state.get("unreadable"):
        return [f"{STATE} cannot be read: which run wrote which table is unknown"]
    entries = state.get("stages", {})
    running = state.get("running")
    chain = STAGES[:STAGES.index(stage)] if stage in STAGES else STAGES
    found = []
    for position, name in enumerate(chain):
        entry = entries.get(name)
        main = _MAIN[name]
        if name != "volumes" and not (Path(out) / main).is_file() and entry is None:
            break              # never run: later stages do not apply (nothing to mix)
        reason = _stage_problem(out, name, entry, entries.get(chain[position - 1])
                                if position else None, running)
        if reason:
            found.append(f"{main} is not from the current stage 1 ({reason})" if name !=
                         "volumes" else f"{main} is not usable ({reason})")
    return found


def _stage_problem(out: Path, name: str, entry: dict | None, upstream: dict | None,
                   running: dict | None) -> str:
    if entry is None or not entry.get("current", False):
        if running and name in running.get("stages", ()):
            return (f"the '{running.get('command')}' started {running.get('started')} did not "
                    "finish")
        if entry is None:
            return f"{name} has not been run since stage 1 ran"
        return f"{entry.get('stale_because', 'an earlier stage was rerun')}"
    if upstream is not None and entry.get("after") != upstream.get("run"):
        return f"{name} ran before the tables it builds on were rewritten"
    for table, digest in entry.get("files", {}).items():
        path = Path(out) / table
        if not path.is_file():
            return f"{table} was removed after {name} wrote it"
        if sha256(path) != digest:
            return f"{table} was changed after {name} wrote it"
    return ""


def require(out: Path, stage: str) -> None:
    """UsageError (one line: the table, the reason, what to rerun) when the tables ``stage``
    builds on do not come from one finished run."""
    found = problems(out, stage)
    if found:
        chain = STAGES[:STAGES.index(stage)]
        first = next(n for n in chain if found[0].startswith(_MAIN[n]))
        more = f" (and {len(found) - 1} more)" if len(found) > 1 else ""
        raise UsageError(f"{out}: {found[0]}{more}; {REMEDY[first].replace('OUT', str(out))}")
