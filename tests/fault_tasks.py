"""Stage-1 task functions that misbehave on purpose, for tests/run/test_faults.py.

They live in a module of their own so that worker processes of ``pipeline.run.executors.run_tasks``
can
import them by name (a function defined inside a test module could not be pickled to a worker).
"""
from __future__ import annotations

import os
import time

from pipeline.run.results import ScanResult
from pipeline.run.executors import volumes_task

#: ``python -c KILL_AT_RENAME NAME ARGS...``: the command line ARGS, killed by SIGKILL inside the
#: rename that would put a file ending in NAME in place (the table is written, not yet renamed).
KILL_AT_RENAME = """
import os, signal, sys
real_replace = os.replace
def replace(src, dst, *args, **kwargs):
    if os.fspath(dst).endswith(sys.argv[1]):
        os.kill(os.getpid(), signal.SIGKILL)   # dies with the table written but not renamed
    return real_replace(src, dst, *args, **kwargs)
os.replace = replace
from pipeline.cli import main
sys.exit(main(sys.argv[2:]))
"""


def crash_reading(subject: str, session: str, mask_path: str, *rest) -> ScanResult:
    """Simulate a crash inside a C library while reading one scan: the process dies at once."""
    os._exit(1)


def slow_volumes_task(subject: str, session: str, mask_path: str, *rest,
                      delay: float = 0.4) -> ScanResult:
    """``volumes_task`` after a pause, so that it is still running when another worker dies."""
    time.sleep(delay)
    return volumes_task(subject, session, mask_path, *rest)
