"""Executors of stage 1: serial, process pool and Dask give the same tables, keep a bounded number
of tasks in flight, and a crashed worker costs only its own scan.

Reference for "same tables": the serial in-process run of the same command (the executor must not
change a single byte of lesions.tsv, masks.tsv or errors.tsv). Reference for the pool's crash
behaviour: the documented BrokenProcessPool semantics of concurrent.futures (every pending future
of a pool whose worker died fails; docs.python.org/3/library/concurrent.futures.html).
"""
from __future__ import annotations

import os
import socket
import sys
import warnings
from concurrent.futures import ProcessPoolExecutor
from pathlib import Path

import numpy as np
import pytest
from exec_tasks import boom, crash, echo, leave
from hypothesis import given
from hypothesis import strategies as st
from nifti_helpers import oblique_affine, random_blobs, save_mask

from pipeline.run import executors as batch
from pipeline.run.executors import run_tasks, volumes_task
from pipeline.cli import main
from pipeline.settings import VolumeSettings
from pipeline.volumes.components import nonzero_flat

HERE = Path(__file__).resolve().parents[1]
NO_IP = "Couldn't detect a suitable IP address"   # harmless offline (dask/distributed#8559)
pytestmark = pytest.mark.filterwarnings(f"ignore:{NO_IP}")
NO_DASK = "dask[distributed] is not installed (optional extra lesion-growth[dask])"


@pytest.fixture(autouse=True)
def tests_importable(monkeypatch):
    """Worker processes must import exec_tasks: put tests/ on their path before a pool starts.

    (Pool workers also receive this process's sys.path, where conftest put tests/.)"""
    paths = [str(HERE)] + [p for p in os.environ.get("PYTHONPATH", "").split(os.pathsep) if p]
    monkeypatch.setenv("PYTHONPATH", os.pathsep.join(paths))


def _local_cluster(**options):
    distributed = pytest.importorskip("distributed", reason=NO_DASK)
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", message=NO_IP)
        # The scheduler serves HTTP (/health, /metrics) even with dashboard_address=None, then on
        # port 8787 of every interface [measured, distributed 2026.8.0]; keep it on a free
        # loopback port so parallel runs do not collide and nothing listens beyond loopback.
        return distributed.LocalCluster(n_workers=2, threads_per_worker=1,
                                        dashboard_address="127.0.0.1:0", **options)


@pytest.fixture(scope="module")
def thread_cluster():
    """Two single-thread workers inside this process (inproc:// address, no network)."""
    cluster = _local_cluster(processes=False)
    try:
        yield cluster.scheduler_address
    finally:
        cluster.close()


@pytest.fixture
def process_cluster():
    """Two worker processes on loopback only (catches pickling problems)."""
    cluster = _local_cluster(processes=True, host="127.0.0.1")
    try:
        yield cluster.scheduler_address
    finally:
        cluster.close()


def echo_tasks(count, folder=None, delay=0.0):
    attempts = str(folder) if folder else None
    return [(echo, ("s", str(i), f"mask{i}.nii.gz", delay, attempts)) for i in range(count)]


def count_pending(monkeypatch, owner, tasks, **options):
    """Run ``tasks`` with ``owner.submit`` wrapped; the peak of submitted-but-not-yet-answered
    tasks, how many tasks had been pulled from the input when the first answer came, and the
    answers by index. A pool submission may carry a chunk of tasks; each counts."""
    seen = {"sent": 0, "answered": 0, "peak": 0, "pulled": 0}
    original = owner.submit

    def counting(self, *args, **kwargs):
        future = original(self, *args, **kwargs)
        seen["sent"] += len(args[1]) if args[0] is batch._packed_chunk else 1
        seen["peak"] = max(seen["peak"], seen["sent"] - seen["answered"])
        return future

    def lazily():
        for task in tasks:
            seen["pulled"] += 1
            yield task

    monkeypatch.setattr(owner, "submit", counting)
    answers, pulled_at_first = {}, None
    for index, result in run_tasks(lazily(), **options):
        pulled_at_first = seen["pulled"] if pulled_at_first is None else pulled_at_first
        seen["answered"] += 1
        assert index not in answers, f"task {index} answered twice"
        answers[index] = result
    return seen["peak"], pulled_at_first, answers


def check_echoes(answers, count):
    assert sorted(answers) == list(range(count))
    assert all(r.ok and r.sha256 == f"mask{i}.nii.gz" and r.session == str(i)
               for i, r in answers.items())


def test_pool_keeps_a_bounded_number_of_tasks_in_flight(monkeypatch):
    # Reference: common practice (bounded submission window) - 200 tasks, never more than 8.
    peak, pulled, answers = count_pending(monkeypatch, ProcessPoolExecutor, echo_tasks(200),
                                          workers=2, in_flight=8)
    check_echoes(answers, 200)
    assert peak == 8
    assert pulled <= 8   # the task list is consumed lazily, not materialised


def test_dask_keeps_a_bounded_number_of_tasks_in_flight(monkeypatch, thread_cluster):
    # Reference: common practice (as_completed + add() as backpressure, Dask futures docs).
    from distributed import Client

    peak, pulled, answers = count_pending(monkeypatch, Client, echo_tasks(200),
                                          scheduler=thread_cluster, in_flight=8)
    check_echoes(answers, 200)
    assert peak == 8
    assert pulled <= 8


def attempts_of(folder, index):
    return len(list(Path(folder).glob(f"{index}.*")))


@pytest.mark.parametrize("how", ["exit", "kill"])
def test_crashed_worker_costs_only_its_scan(tmp_path, how):
    """os._exit (a crash in a C library) or SIGKILL (what the out-of-memory killer sends)."""
    # Reference: BrokenProcessPool semantics (module docstring); the retry rule is ours.
    tasks = echo_tasks(16, tmp_path, delay=0.1)
    tasks[5] = (crash, ("s", "5", "mask5.nii.gz", 0.1, str(tmp_path), how))
    answers = dict(run_tasks(tasks, workers=2, in_flight=4))
    assert sorted(answers) == list(range(16))
    bad = answers.pop(5)
    assert not bad.ok
    assert bad.error.startswith("mask5.nii.gz: worker process died while measuring this scan")
    assert "retried alone" in bad.error
    assert all(r.ok and r.sha256 == f"mask{i}.nii.gz" for i, r in answers.items())
    assert attempts_of(tmp_path, 5) == 2          # once among others, once alone
    retried = [i for i in answers if attempts_of(tmp_path, i) == 2]
    assert retried, "the innocent scan running beside the crash should have been retried"
    assert all(attempts_of(tmp_path, i) <= 2 for i in answers)


def test_scan_whose_worker_dies_once_succeeds_when_retried(tmp_path):
    tasks = echo_tasks(8, tmp_path, delay=0.05)
    tasks[2] = (crash, ("s", "2", "mask2.nii.gz", 0.05, str(tmp_path), "once"))
    answers = dict(run_tasks(tasks, workers=2, in_flight=4))
    check_echoes(answers, 8)
    assert attempts_of(tmp_path, 2) == 2


def test_dask_worker_death_costs_only_its_scan(tmp_path, process_cluster):
    """Dask retries a task whose worker died on fresh workers and then gives up (KilledWorker,
    distributed.dask.org/en/stable/killed.html); one task at a time so no innocent task shares
    the dying worker."""
    tasks = echo_tasks(8, tmp_path, delay=0.02)
    tasks[4] = (crash, ("s", "4", "mask4.nii.gz", 0.02, str(tmp_path), "exit"))
    answers = dict(run_tasks(tasks, scheduler=process_cluster, in_flight=1))
    bad = answers.pop(4)
    assert bad.error.startswith("mask4.nii.gz: worker process died each time this scan ran on "
                                "the cluster")
    assert attempts_of(tmp_path, 4) >= 2
    assert sorted(answers) == [0, 1, 2, 3, 5, 6, 7]
    assert all(r.ok and r.sha256 == f"mask{i}.nii.gz" for i, r in answers.items())


@pytest.mark.parametrize("executor", ["serial", "pool", "dask"])
def test_task_that_raises_is_a_failed_scan(executor, request):
    options = {"serial": {}, "pool": {"workers": 2}}.get(executor)
    if options is None:
        options = {"scheduler": request.getfixturevalue("thread_cluster")}
    tasks = echo_tasks(6)
    tasks[3] = (boom, ("s", "3", "mask3.nii.gz"))
    answers = dict(run_tasks(tasks, **options))
    bad = answers.pop(3)
    assert "RuntimeError: bug while measuring mask3.nii.gz" in bad.error
    assert bad.error.startswith("mask3.nii.gz: task failed")
    assert sorted(answers) == [0, 1, 2, 4, 5] and all(r.ok for r in answers.values())


def test_bad_arguments_are_refused():
    with pytest.raises(ValueError, match="in_flight must be at least 1; got 0"):
        list(run_tasks(echo_tasks(2), workers=2, in_flight=0))
    with pytest.raises(ValueError, match="--workers must be 0"):
        list(run_tasks(echo_tasks(2), workers=-1))


@given(shape=st.tuples(*[st.integers(0, 23)] * 3), density=st.sampled_from([0, 0.01, 0.3, 1]),
       dtype=st.sampled_from(["uint8", "int16", "uint16", "int32", "int64", "float32", "bool"]),
       order=st.sampled_from("CF"), seed=st.integers(0, 2 ** 16))
def test_component_image_survives_the_trip_back(shape, density, dtype, order, seed):
    # Reference: numpy itself (np.flatnonzero, np.array_equal) on the original array.
    rng = np.random.default_rng(seed)
    image = np.where(rng.random(shape) < density, rng.integers(1, 120, shape), 0)
    image = np.asarray(image, dtype=dtype, order=order)
    flat = image.ravel(order="K")
    assert np.array_equal(nonzero_flat(flat), np.flatnonzero(flat))
    if image.dtype.kind == "f":          # negative zero is zero, though its bytes are not
        assert np.array_equal(nonzero_flat(np.where(flat == 0, -0.0, flat).astype(flat.dtype)),
                              np.flatnonzero(flat))
    back = batch.SparseImage.of(image).array()
    assert back.dtype == image.dtype and back.shape == image.shape
    assert np.array_equal(back, image)
    assert back.flags.f_contiguous == image.flags.f_contiguous
    assert back.flags.c_contiguous == image.flags.c_contiguous


def test_pool_returns_the_same_component_images_as_serial(tmp_path):
    # Reference: the serial in-process run of volumes_task.
    tasks = []
    for k in range(4):
        path = save_mask(tmp_path / f"m{k}.nii.gz", random_blobs(count=3 + k, seed=k),
                         oblique_affine())
        tasks.append((volumes_task, ("A", str(k), str(path), None, VolumeSettings())))
    serial = dict(run_tasks(tasks))
    pooled = dict(run_tasks(tasks, workers=2))
    for k, expected in serial.items():
        got = pooled[k]
        assert expected.ok and got.ok
        assert got.table.equals(expected.table)
        image, reference = got.component_image(), expected.component_image()
        assert image.dtype == reference.dtype
        assert image.flags.f_contiguous == reference.flags.f_contiguous
        assert np.array_equal(image, reference)
        assert got.offset == expected.offset and got.shape == expected.shape
        assert np.array_equal(got.affine, expected.affine) and got.sha256 == expected.sha256


# ---------------------------------------------------------------- end to end through the CLI

@pytest.fixture(scope="module")
def cohort(tmp_path_factory):
    """Three invented subjects, two sessions each, plus one truncated file (an error row)."""
    folder = tmp_path_factory.mktemp("cohort")
    rows = []
    for n, subject in enumerate(["A", "B", "C"]):
        for k, date in enumerate(["2024-01-10", "2024-04-02"]):
            name = f"sub-{subject}_ses-{k + 1}.nii.gz"
            data = random_blobs(count=4 + n + k, seed=10 * n + k)
            save_mask(folder / name, data, oblique_affine(zooms=(0.9, 1.0, 2.0 + n)))
            rows.append(f"{subject}\t{k + 1}\t{name}\t{date}")
    whole = (folder / "sub-A_ses-1.nii.gz").read_bytes()
    (folder / "broken.nii.gz").write_bytes(whole[: len(whole) // 2])
    rows.append("D\t1\tbroken.nii.gz\t2024-01-10")
    manifest = folder / "manifest.tsv"
    manifest.write_text("subject\tsession\tmask\tdate\n" + "\n".join(rows) + "\n")
    return manifest


TABLES = ("lesions.tsv", "masks.tsv", "errors.tsv")


@pytest.fixture(scope="module")
def serial_tables(cohort, tmp_path_factory):
    out = tmp_path_factory.mktemp("serial")
    assert main(["volumes", str(cohort), "-o", str(out), "--quiet"]) == 1   # the broken file
    tables = {name: (out / name).read_bytes() for name in TABLES}
    assert tables["lesions.tsv"].count(b"\n") > 20 and tables["errors.tsv"].count(b"\n") == 2
    return tables


@pytest.mark.parametrize("executor", ["pool", "dask-threads", "dask-processes"])
def test_same_tables_serial_pool_and_dask(executor, cohort, serial_tables, tmp_path, request):
    # Reference: the serial in-process run (see the module docstring).
    if executor == "pool":
        extra = ["--workers", "2"]
    else:
        fixture = "thread_cluster" if executor == "dask-threads" else "process_cluster"
        extra = ["--scheduler", request.getfixturevalue(fixture)]
    out = tmp_path / "out"
    assert main(["volumes", str(cohort), "-o", str(out), "--quiet", *extra]) == 1
    for name in TABLES:
        assert (out / name).read_bytes() == serial_tables[name], name


def test_scheduler_without_dask_is_a_usage_error(cohort, tmp_path, monkeypatch, capsys):
    monkeypatch.setitem(sys.modules, "dask.distributed", None)   # import fails as if missing
    code = main(["volumes", str(cohort), "-o", str(tmp_path / "out"), "--quiet",
                 "--scheduler", "tcp://127.0.0.1:8786"])
    assert code == 2
    assert "--scheduler needs Dask distributed: pip install 'lesion-growth[dask]'" in \
        capsys.readouterr().err


def free_loopback_port() -> int:
    with socket.socket() as probe:
        probe.bind(("127.0.0.1", 0))
        return probe.getsockname()[1]


@pytest.mark.parametrize("address", ["closed-port", "no-port"])
def test_unreachable_scheduler_is_a_usage_error(address, cohort, tmp_path, monkeypatch, capsys):
    pytest.importorskip("distributed", reason=NO_DASK)
    monkeypatch.setattr(batch, "CONNECT_TIMEOUT_S", 1.0)
    address = f"tcp://127.0.0.1:{free_loopback_port()}" if address == "closed-port" \
        else "127.0.0.1"
    code = main(["volumes", str(cohort), "-o", str(tmp_path / "out"), "--quiet",
                 "--scheduler", address])
    assert code == 2
    assert f"cannot reach the Dask scheduler at '{address}'" in capsys.readouterr().err
    assert not (tmp_path / "out" / "lesions.tsv").exists()


def test_workers_zero_means_every_usable_core(monkeypatch):
    # Reference: os.sched_getaffinity (Python docs) - the cores this process may run on.
    sizes = []
    monkeypatch.setattr(batch, "_run_pool", lambda tasks, workers, limit: sizes.append(
        (workers, limit)) or iter(()))
    list(run_tasks(echo_tasks(50), workers=0))
    cores = len(os.sched_getaffinity(0))
    if cores == 1:
        assert sizes == []
    else:
        assert sizes == [(cores, batch.PER_WORKER_IN_FLIGHT * cores)]


def test_stage1_worker_path_does_not_import_pandas(tmp_path):
    # Common practice (start-up cost): the fork server preloads what a stage-1 task needs;
    # pandas alone is ~0.3 s of that, and workers return plain column arrays instead.
    import subprocess

    mask = tmp_path / "m.nii.gz"
    data = np.zeros((8, 8, 8), np.uint8)
    data[2:4, 2:4, 2:4] = 1
    import nibabel as nib

    nib.save(nib.Nifti1Image(data, np.eye(4)), str(mask))
    code = ("import sys\n"
            "from pipeline.run.executors import PRELOAD, volumes_task\n"
            "from pipeline.settings import VolumeSettings\n"
            "for name in PRELOAD[1:]:\n"
            "    __import__(name)\n"
            f"r = volumes_task('s', '1', {str(mask)!r}, None, VolumeSettings(),\n"
            f"                 {str(tmp_path)!r})\n"
            "assert r.ok and list(r.columns['voxels']) == [8], r\n"
            "print('pandas' in sys.modules)\n")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
    assert out.stdout.strip() == "False"


def test_task_raising_system_exit_in_a_pool_costs_only_its_scan():
    # Common practice (fault isolation): pool tasks travel in chunks; one task's SystemExit must
    # not fail the other scans of its chunk.
    tasks = echo_tasks(8)
    tasks[3] = (leave, ("s", "3", "mask3.nii.gz"))
    answers = dict(run_tasks(tasks, workers=2, in_flight=8))
    bad = answers.pop(3)
    assert bad.error.startswith("mask3.nii.gz: task failed (SystemExit: 2)")
    assert sorted(answers) == [0, 1, 2, 4, 5, 6, 7]
    assert all(r.ok and r.sha256 == f"mask{i}.nii.gz" for i, r in answers.items())
