"""Task functions for the executor tests. They live in an importable module (not in a test file)
because worker processes import them by name; tests/ reaches the workers through sys.path."""
from __future__ import annotations

import os
import signal
import time
import uuid
from pathlib import Path

from pipeline.run.results import ScanResult


def echo(subject: str, session: str, path: str, delay: float = 0.0,
         attempts: str | None = None) -> ScanResult:
    """Return the inputs; with ``attempts``, leave one file per call there (counts the calls)."""
    if attempts:
        (Path(attempts) / f"{session}.{uuid.uuid4().hex}").touch()
    if delay:
        time.sleep(delay)
    return ScanResult(subject, session, sha256=path)


def crash(subject: str, session: str, path: str, delay: float = 0.0,
          attempts: str | None = None, how: str = "exit") -> ScanResult:
    """Kill this worker process: ``exit`` (os._exit, like a crash in a C library), ``kill``
    (SIGKILL, what the out-of-memory killer sends) or ``once`` (only on the first call)."""
    if attempts:
        (Path(attempts) / f"{session}.{uuid.uuid4().hex}").touch()
        if how == "once" and len(list(Path(attempts).glob(f"{session}.*"))) > 1:
            return echo(subject, session, path)
    # Die at once: the other worker is then in the middle of a task (each takes ``delay``).
    if how == "kill":
        os.kill(os.getpid(), signal.SIGKILL)
    os._exit(3)


def boom(subject: str, session: str, path: str) -> ScanResult:
    """Raise like a bug would (volumes_task itself never raises)."""
    raise RuntimeError(f"bug while measuring {path}")


def leave(subject: str, session: str, path: str) -> ScanResult:
    """Raise SystemExit, as a library calling sys.exit would (not an Exception)."""
    raise SystemExit(2)
