"""Per-scan work of stage 1 and the executors that run it: serial, a process pool or Dask.

A task takes plain values (a path and settings), reads the mask once and returns a small result:
the scan's component rows and its cropped component image, or the reason it failed. One writer (the
caller) collects results as they complete, with a bound on tasks in flight so memory stays flat.
"""
from __future__ import annotations

import contextlib
import hashlib
import os
import sys
import traceback
from collections import deque
from collections.abc import Callable, Generator, Iterable, Iterator
from concurrent.futures import FIRST_COMPLETED, Future, ProcessPoolExecutor, wait
from concurrent.futures.process import BrokenProcessPool
from itertools import chain, islice
from pathlib import Path
from typing import Any

from pipeline.errors import InputError, UsageError
from pipeline.settings import VolumeSettings
from pipeline.run.results import ScanResult, SparseImage


def volumes_task(subject: str, session: str, mask_path: str, labels: tuple[int, ...] | None,
                 settings: VolumeSettings, cache_dir: str | None = None,
                 digest: str = "") -> ScanResult:
    """Read one mask and measure its components; never raises for a bad input.

    With ``cache_dir``, a result stored for the same file content and settings is reused, and a
    new result is stored there.
    """
    from pipeline.run import cache

    raw = None
    if cache_dir and os.path.isfile(mask_path):
        raw = _read(mask_path)
        if raw is not None:
            key = cache.cache_key(hashlib.sha256(raw).hexdigest(), digest, labels)
            hit = cache.load_result(Path(cache_dir), key, subject, session, mask_path)
            if hit is not None:
                return hit
    result = _measure_scan(subject, session, mask_path, labels, settings, raw).compact()
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
    from pipeline.io.nifti import load_mask
    from pipeline.volumes.components import measure_columns

    try:
        mask = load_mask(mask_path, settings=settings, raw=raw)
        columns, found = measure_columns(mask.data, mask.affine, labels=labels,
                                         settings=settings, name=mask_path)
    except InputError as exc:
        return ScanResult(subject, session, error=str(exc))
    except MemoryError:
        return ScanResult(subject, session, error=f"{mask_path}: out of memory while reading")
    except Exception as exc:  # a bug must cost one scan, not the batch; keep the evidence
        where = traceback.extract_tb(exc.__traceback__)[-1]
        return ScanResult(subject, session, error=f"{mask_path}: internal error "
                          f"{type(exc).__name__}: {exc} (at {os.path.basename(where.filename)}:"
                          f"{where.lineno})")
    offset, shape, where, ids = found.flat()
    components = SparseImage.from_voxels(shape, ids.dtype, found.order, where, ids)
    return ScanResult(subject, session, columns=columns, components=components, offset=offset,
                      shape=tuple(int(s) for s in mask.data.shape[:3]), affine=mask.affine,
                      file_affine=mask.file_affine, units_code=mask.units_code,
                      forms=mask.forms, form_codes=mask.form_codes,
                      sha256=mask.sha256, warnings=mask.warnings)


def _init_worker() -> None:
    """Keep each worker process to one thread: the parallelism is across scans. numpy is
    already imported here (the fork server preloads it), so its BLAS is limited through
    threadpoolctl, not through environment variables; ITK reads its variable when first used."""
    for name in ("OMP_NUM_THREADS", "OPENBLAS_NUM_THREADS", "MKL_NUM_THREADS",
                 "ITK_GLOBAL_DEFAULT_NUMBER_OF_THREADS"):
        os.environ[name] = "1"
    from threadpoolctl import threadpool_limits

    threadpool_limits(1)
    if "SimpleITK" in sys.modules:
        sys.modules["SimpleITK"].ProcessObject.SetGlobalDefaultNumberOfThreads(1)


#: Modules the fork server imports once for every worker: what a stage-1 task uses.
PRELOAD = ("__main__", "pipeline.run.executors", "pipeline.io.nifti", "pipeline.volumes.components",
           "pipeline.run.cache", "pipeline.errors", "cc3d", "isal.isal_zlib", "threadpoolctl")


def _pool_context() -> Any:
    """Workers are forked from a fork server that has imported this module once (clean - no
    copied threads or locks - and quick to start: no import per worker), or spawned where there
    is no fork server."""
    import multiprocessing

    if "forkserver" not in multiprocessing.get_all_start_methods():
        return multiprocessing.get_context("spawn")
    context = multiprocessing.get_context("forkserver")
    context.set_forkserver_preload(list(PRELOAD))
    return context


def start_pool_server(workers: int) -> None:
    """Start the fork server now when a pool will be used, so that its imports (about 0.4 s)
    overlap the caller's own work, such as reading the inputs. No effect for a serial run."""
    if workers == 1 or (workers == 0 and _cpu_count() == 1):
        return
    if _pool_context().get_start_method() == "forkserver":
        from multiprocessing import forkserver

        forkserver.ensure_running()


Task = tuple[Callable[..., ScanResult], tuple[Any, ...]]
Numbered = Iterator[tuple[int, Task]]

CONNECT_TIMEOUT_S = 20.0   # seconds --scheduler waits for the Dask scheduler to answer
PER_WORKER_IN_FLIGHT = 16  # default bound on pending tasks, per worker process or Dask thread
MAX_CHUNK = 8              # tasks per message to a pool worker (two chunks per worker in flight)


def run_tasks(tasks: Iterable[Task], *, workers: int = 1, scheduler: str | None = None,
              in_flight: int | None = None) -> Iterator[tuple[int, ScanResult]]:
    """Run ``(function, args)`` tasks; yield ``(index, result)`` as each completes.

    ``workers`` 1 runs in this process, N > 1 in a process pool (0 = all cores); ``scheduler``
    sends the tasks to an existing Dask distributed cluster instead. ``tasks`` is consumed lazily
    and at most ``in_flight`` tasks (default 16 per worker) are pending at any time, so memory
    stays flat however many scans there are. Results come in completion order; the index says
    which task each belongs to. A task that raises gives a failed ``ScanResult`` (args must
    start with subject, session, mask path) and the others go on. If a pool worker dies (a crash
    in a library, the out-of-memory killer), the pool is restarted and the tasks it was running
    are retried one at a time; only a task that kills its worker again fails.

    Examples
    --------
    >>> def measure(subject, session, path):
    ...     return ScanResult(subject, session, sha256=path)
    >>> [(i, r.sha256) for i, r in run_tasks([(measure, ("a", "1", "x.nii.gz"))])]
    [(0, 'x.nii.gz')]
    """
    if workers < 0:
        raise UsageError(f"--workers must be 0 (all cores) or a positive count; got {workers}")
    if in_flight is not None and in_flight < 1:
        raise ValueError(f"in_flight must be at least 1; got {in_flight}")
    numbered = enumerate(tasks)
    if scheduler:
        yield from _run_dask(numbered, scheduler, in_flight)
        return
    count = _cpu_count() if workers == 0 else workers
    if count == 1:
        for index, task in numbered:
            yield index, _call(task)
        return
    head = list(islice(numbered, count))   # never start more processes than there are tasks
    if head:
        yield from _run_pool(chain(head, numbered), min(count, len(head)),
                             in_flight or PER_WORKER_IN_FLIGHT * count)


def _cpu_count() -> int:
    """Cores this process may use (the affinity mask in containers), at least 1."""
    try:
        return max(1, len(os.sched_getaffinity(0)))
    except AttributeError:  # pragma: no cover - not Linux
        return os.cpu_count() or 1


def _call(task: Task) -> ScanResult:
    func, args = task
    try:
        return func(*args)
    except Exception as exc:  # same outcome as in a pool: one failed scan, the batch goes on
        return _raised(task, exc)


def _failed(task: Task, reason: str) -> ScanResult:
    _, args = task
    return ScanResult(args[0], args[1], error=f"{args[2]}: {reason}")


def _raised(task: Task, exc: BaseException) -> ScanResult:
    return _failed(task, f"task failed ({type(exc).__name__}: {exc})")


def _crashed(task: Task) -> ScanResult:
    return _failed(task, "worker process died while measuring this scan when retried alone, "
                   "after its pool broke with it in flight (killed by the system, e.g. out of "
                   "memory, or a crash in a library)")


def _packed_call(func: Callable[..., ScanResult], *args: Any) -> ScanResult:
    """Run a task in a worker and shrink its component image for the trip back."""
    result = _call((func, args))
    return result.compact() if isinstance(result, ScanResult) else result


def _packed_chunk(tasks: list[Task]) -> list[ScanResult]:
    """Run several tasks in one worker call (one message each way instead of one per scan).
    Whatever one task raises (even SystemExit) stays that task's failure, not its chunk's."""
    results = []
    for func, args in tasks:
        try:
            results.append(_packed_call(func, *args))
        except KeyboardInterrupt:
            raise
        except BaseException as exc:  # noqa: B036 - one scan's failure, the others go on
            results.append(_raised((func, args), exc))
    return results


class _PoolRun:
    """State of one process-pool run that outlives a broken pool.

    Tasks go to the pool in chunks of up to ``chunk`` (fewer messages, so the parent process
    takes less of the cores the workers need). Tasks in flight when a worker dies are suspects
    (which of them was running is not known): each is retried alone in a fresh pool, so an
    innocent scan succeeds and only a scan that kills its worker while running alone fails.
    Suspects run one at a time before normal work resumes.
    """

    def __init__(self, numbered: Iterable[tuple[int, Task]], limit: int, chunk: int) -> None:
        self.numbered = iter(numbered)
        self.limit = limit
        self.chunk = chunk
        self.tasks: dict[int, Task] = {}       # pulled and not yet answered
        self.suspected: set[int] = set()       # in flight once when a pool broke
        self.suspects: deque[int] = deque()    # to retry alone
        self.unsent: deque[int] = deque()      # pulled but refused by a pool that just broke

    def fill(self, pool: ProcessPoolExecutor, running: dict[Future, list[int]]) -> bool:
        """Submit up to the bound; False if the pool turned out to be broken."""
        while True:
            if self.suspects:
                if running:
                    return True
                batch = [self.suspects.popleft()]
            else:
                room = min(self.chunk, self.limit - sum(len(b) for b in running.values()))
                batch = []
                while len(batch) < room:
                    if self.unsent:
                        batch.append(self.unsent.popleft())
                        continue
                    item = next(self.numbered, None)
                    if item is None:
                        break
                    index, task = item
                    self.tasks[index] = task
                    batch.append(index)
                if not batch:
                    return True
            if not _submit_to_pool(pool, running, batch, [self.tasks[i] for i in batch]):
                for index in reversed(batch):
                    (self.suspects if index in self.suspected else self.unsent).appendleft(index)
                return False

    def settle(self, future: Future, batch: list[int]) -> list[tuple[int, ScanResult]]:
        """The results of a finished chunk; none for the tasks whose worker died (they are
        retried)."""
        exc = future.exception()
        if exc is None:
            answers = list(zip(batch, future.result()))   # kept sparse: densified when needed
        elif not isinstance(exc, BrokenProcessPool):
            answers = [(index, _raised(self.tasks[index], exc)) for index in batch]
        elif len(batch) == 1 and batch[0] in self.suspected:   # it ran alone: the culprit
            answers = [(batch[0], _crashed(self.tasks[batch[0]]))]
        else:
            answers = []
            for index in batch:
                self.suspected.add(index)
                self.suspects.append(index)
        for index, _ in answers:
            del self.tasks[index]
        return answers


def _submit_to_pool(pool: ProcessPoolExecutor, running: dict[Future, list[int]],
                    batch: list[int], tasks: list[Task]) -> bool:
    try:
        running[pool.submit(_packed_chunk, tasks)] = batch
    except BrokenProcessPool:
        return False
    return True


def _run_pool(numbered: Iterable[tuple[int, Task]], workers: int, limit: int
              ) -> Iterator[tuple[int, ScanResult]]:
    """A process pool, at most ``limit`` tasks pending; restarted if a worker dies."""
    context = _pool_context()
    state = _PoolRun(numbered, limit, max(1, min(MAX_CHUNK, limit // (2 * workers))))
    while True:
        pool = ProcessPoolExecutor(workers, mp_context=context, initializer=_init_worker)
        try:
            broken = yield from _drain(pool, state)
            if broken:
                _kill_leftover_workers(pool)
        finally:
            pool.shutdown(wait=True, cancel_futures=True)
        if not broken:
            return


def _kill_leftover_workers(pool: ProcessPoolExecutor) -> None:
    """Kill the broken pool's workers that are still alive before shutting it down.

    A worker started on demand (inside ``submit``) while another one was dying escapes the
    standard library's clean-up of a broken pool, and ``shutdown`` then waits for it forever
    [measured: CPython 3.11.7, forkserver, a task calling os._exit at once]. Python 3.14 has
    ``kill_workers()``; before that the pool keeps its processes in ``_processes``.
    """
    for process in list((getattr(pool, "_processes", None) or {}).values()):
        with contextlib.suppress(OSError, ValueError, AssertionError):
            if process.is_alive():
                process.kill()


def _drain(pool: ProcessPoolExecutor, state: _PoolRun
           ) -> Generator[tuple[int, ScanResult], None, bool]:
    """Keep ``pool`` busy until the work is done (returns False) or the pool breaks (True)."""
    running: dict[Future, list[int]] = {}
    while True:
        intact = state.fill(pool, running)
        if not running:
            return not intact
        done, _ = wait(running, return_when=FIRST_COMPLETED)
        if not intact or any(isinstance(f.exception(), BrokenProcessPool) for f in done):
            done, _ = wait(running)   # a broken pool fails every pending future promptly
            intact = False
        for future in done:
            yield from state.settle(future, running.pop(future))
        if not intact:
            return True


def _run_dask(numbered: Numbered, address: str, limit: int | None
              ) -> Iterator[tuple[int, ScanResult]]:
    """Send the tasks to the Dask scheduler at ``address``, at most ``limit`` pending at a time.

    Workers must see the mask paths (a shared file system) and have the same packages. A lost
    worker is Dask's to handle (its tasks are rescheduled; a task that keeps killing workers
    ends as ``KilledWorker``), and any task error becomes that scan's failed result.
    """
    client, as_completed = _connect(address)
    try:
        limit = limit or PER_WORKER_IN_FLIGHT * max(1, sum(client.nthreads().values()))
        queue = as_completed(loop=client.loop)
        running: dict[Any, tuple[int, Task]] = {}
        while len(running) < limit and _submit(client, queue, numbered, running):
            pass
        for future in queue:
            index, task = running.pop(future.key)
            try:
                result = future.result()   # kept sparse: the parent densifies only when needed
            except Exception as exc:  # a task error or a lost worker costs only its scan
                result = _failed(task, _cluster_reason(exc))
            del future
            yield index, result
            _submit(client, queue, numbered, running)
    finally:
        client.close()


def _cluster_reason(exc: Exception) -> str:
    if type(exc).__name__ == "KilledWorker":
        return ("worker process died each time this scan ran on the cluster (killed by the "
                "system, e.g. out of memory, or a crash in a library; Dask gave up with "
                "KilledWorker)")
    return f"task failed on the cluster ({type(exc).__name__}: {exc})"


def _connect(address: str) -> tuple[Any, Any]:
    """A client of the scheduler at ``address`` and Dask's ``as_completed``; UsageError if not."""
    try:
        from dask.distributed import Client, as_completed
    except ImportError:
        raise UsageError("--scheduler needs Dask distributed: pip install 'lesion-growth[dask]'"
                         ) from None
    try:
        client = Client(address, timeout=CONNECT_TIMEOUT_S, set_as_default=False)
    except (OSError, TimeoutError, ValueError) as exc:
        raise UsageError(f"cannot reach the Dask scheduler at {address!r}: {exc}") from None
    return client, as_completed


def _submit(client: Any, queue: Any, numbered: Numbered, running: dict) -> bool:
    """Submit the next task, if any (``pure=False``: every scan is its own task)."""
    item = next(numbered, None)
    if item is None:
        return False
    index, (func, args) = item
    future = client.submit(_packed_call, func, *args, pure=False)
    running[future.key] = (index, (func, args))
    queue.add(future)
    return True
