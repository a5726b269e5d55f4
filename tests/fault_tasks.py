"""Stage-1 task functions that misbehave on purpose, for tests/test_faults.py.

They live in a module of their own so that worker processes of ``pipeline.batch.run_tasks`` can
import them by name (a function defined inside a test module could not be pickled to a worker).
"""
from __future__ import annotations

import os
import time

from pipeline.batch import ScanResult, volumes_task


def crash_reading(subject: str, session: str, mask_path: str, *rest) -> ScanResult:
    """Simulate a crash inside a C library while reading one scan: the process dies at once."""
    os._exit(1)


def slow_volumes_task(subject: str, session: str, mask_path: str, *rest,
                      delay: float = 0.4) -> ScanResult:
    """``volumes_task`` after a pause, so that it is still running when another worker dies."""
    time.sleep(delay)
    return volumes_task(subject, session, mask_path, *rest)
