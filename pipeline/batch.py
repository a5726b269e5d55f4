"""Per-scan work of stage 1 and the executors that run it: serial, a process pool or Dask.

A task takes plain values (a path and settings), reads the mask once and returns a small result:
the scan's component rows and its cropped component image, or the reason it failed. One writer (the
caller) collects results as they complete, with a bound on tasks in flight so memory stays flat.
"""
from __future__ import annotations

import dataclasses
import hashlib
import os
import traceback
from collections.abc import Callable, Iterable, Iterator
from concurrent.futures import FIRST_COMPLETED, Future, ProcessPoolExecutor, wait
from concurrent.futures.process import BrokenProcessPool
from dataclasses import dataclass
from pathlib import Path
from typing import Any

import numpy as np
import pandas as pd

from pipeline.errors import InputError, UsageError
from pipeline.settings import VolumeSettings


@dataclass(frozen=True, eq=False)
class ScanResult:
    """What stage 1 learns from one mask (picklable, small)."""

    subject: str
    session: str
    table: pd.DataFrame | None = None        # component rows (volumes.MEASURE_COLUMNS)
    components: np.ndarray | None = None     # crop-box component image
    offset: tuple[int, int, int] = (0, 0, 0)
    shape: tuple[int, int, int] = (0, 0, 0)
    affine: np.ndarray | None = None         # voxel -> RAS+ mm
    file_affine: np.ndarray | None = None    # as stored, in the file's units
    units_code: int = 2
    sha256: str = ""
    warnings: tuple[str, ...] = ()
    error: str = ""
    cached: bool = False

    @property
    def ok(self) -> bool:
        return not self.error


def volumes_task(subject: str, session: str, mask_path: str, labels: tuple[int, ...] | None,
                 settings: VolumeSettings, cache_dir: str | None = None,
                 digest: str = "") -> ScanResult:
    """Read one mask and measure its components; never raises for a bad input.

    With ``cache_dir``, a result stored for the same file content and settings is reused, and a
    new result is stored there.
    """
    from pipeline import cache

    raw = None
    if cache_dir and os.path.isfile(mask_path):
        raw = _read(mask_path)
        if raw is not None:
            key = cache.cache_key(hashlib.sha256(raw).hexdigest(), digest, labels)
            hit = cache.load_result(Path(cache_dir), key, subject, session, mask_path)
            if hit is not None:
                return hit
    result = _measure_scan(subject, session, mask_path, labels, settings, raw)
    if cache_dir and result.ok and raw is not None:
        cache.save_result(Path(cache_dir), cache.cache_key(result.sha256, digest, labels), result,
                          mask_path)
    return result


def _read(path: str) -> bytes | None:
    if not path.lower().endswith((".nii", ".nii.gz")):
        return None
    try:
        with open(path, "rb") as handle:
            return handle.read()
    except OSError:
        return None


def _measure_scan(subject: str, session: str, mask_path: str, labels: tuple[int, ...] | None,
                  settings: VolumeSettings, raw: bytes | None) -> ScanResult:
    from pipeline.io import load_mask
    from pipeline.volumes import component_table

    try:
        mask = load_mask(mask_path, settings=settings, raw=raw)
        table, components, offset = component_table(
            mask.data, mask.affine, labels=labels, connectivity=settings.connectivity,
            min_volume_mm3=settings.min_volume_mm3,
            measurable_min_diameter_mm=settings.measurable_min_diameter_mm,
            measurable_min_slices=settings.measurable_min_slices, name=mask_path)
    except InputError as exc:
        return ScanResult(subject, session, error=str(exc))
    except MemoryError:
        return ScanResult(subject, session, error=f"{mask_path}: out of memory while reading")
    except Exception as exc:  # a bug must cost one scan, not the batch; keep the evidence
        where = traceback.extract_tb(exc.__traceback__)[-1]
        return ScanResult(subject, session, error=f"{mask_path}: internal error "
                          f"{type(exc).__name__}: {exc} (at {os.path.basename(where.filename)}:"
                          f"{where.lineno})")
    return ScanResult(subject, session, table=table, components=components, offset=offset,
                      shape=tuple(int(s) for s in mask.data.shape[:3]), affine=mask.affine,
                      file_affine=mask.file_affine, units_code=mask.units_code,
                      sha256=mask.sha256, warnings=mask.warnings)


def _init_worker() -> None:
    """Keep each worker process to one thread: the parallelism is across scans."""
    for name in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS"):
        os.environ[name] = "1"
    try:
        import SimpleITK as sitk

        sitk.ProcessObject.SetGlobalDefaultNumberOfThreads(1)
    except ImportError:  # pragma: no cover - SimpleITK is a dependency
        pass


Task = tuple[Callable[..., ScanResult], tuple[Any, ...]]


def run_tasks(tasks: Iterable[Task], *, workers: int = 1, scheduler: str | None = None,
              in_flight: int | None = None) -> Iterator[tuple[int, ScanResult]]:
    """Run ``(function, args)`` tasks; yield ``(index, result)`` as each completes.

    ``workers`` 1 runs in this process, N > 1 in a process pool (0 = all cores); ``scheduler``
    sends the tasks to an existing Dask distributed cluster instead. At most ``in_flight`` tasks
    (default 4 per worker) are pending at any time.
    """
    tasks = list(tasks)
    if scheduler:
        yield from _run_dask(tasks, scheduler, in_flight)
    elif workers == 1 or len(tasks) <= 1:
        for index, (func, args) in enumerate(tasks):
            yield index, func(*args)
    else:
        count = (os.cpu_count() or 1) if workers == 0 else workers
        yield from _run_pool(tasks, count, in_flight or 4 * count)


def _run_pool(tasks: list[Task], workers: int, limit: int) -> Iterator[tuple[int, ScanResult]]:
    import multiprocessing

    pending = list(enumerate(tasks))[::-1]
    context = multiprocessing.get_context("forkserver")
    while pending:
        with ProcessPoolExecutor(workers, mp_context=context, initializer=_init_worker) as pool:
            running: dict[Future, int] = {}
            try:
                while pending or running:
                    while pending and len(running) < limit:
                        index, (func, args) = pending.pop()
                        running[pool.submit(func, *args)] = index
                    done, _ = wait(running, return_when=FIRST_COMPLETED)
                    for future in done:
                        index = running.pop(future)
                        yield index, future.result()
            except BrokenProcessPool:
                for future, index in running.items():
                    yield index, _crashed(tasks[index])
                running.clear()


def _crashed(task: Task) -> ScanResult:
    _, args = task
    return ScanResult(args[0], args[1], error=f"{args[2]}: worker process died while reading "
                      "this scan (out of memory or a crash in a library)")


def _run_dask(tasks: list[Task], address: str, limit: int | None
              ) -> Iterator[tuple[int, ScanResult]]:
    try:
        from dask.distributed import Client, as_completed
    except ImportError:
        raise UsageError("--scheduler needs Dask: pip install 'lesion-growth[dask]'") from None
    try:
        client = Client(address, timeout="20s")
    except (OSError, TimeoutError) as exc:
        raise UsageError(f"cannot reach the Dask scheduler at {address}: {exc}") from None
    try:
        limit = limit or 4 * max(1, sum(client.nthreads().values()))
        pending = list(enumerate(tasks))[::-1]
        index_of: dict[Any, int] = {}
        queue = as_completed()
        while pending and len(index_of) < limit:
            _submit(client, queue, pending, index_of)
        for future in queue:
            index = index_of.pop(future.key)
            try:
                result = future.result()
            except Exception as exc:  # a lost worker costs only its scan
                result = dataclasses.replace(_crashed(tasks[index]),
                                             error=f"{tasks[index][1][2]}: task failed on the "
                                             f"cluster ({type(exc).__name__}: {exc})")
            yield index, result
            if pending:
                _submit(client, queue, pending, index_of)
    finally:
        client.close()


def _submit(client: Any, queue: Any, pending: list, index_of: dict) -> None:
    index, (func, args) = pending.pop()
    future = client.submit(func, *args, pure=False)
    index_of[future.key] = index
    queue.add(future)
