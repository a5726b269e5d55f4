"""Output folder problems through every command that writes to OUT: one line on stderr, exit
status 2, nothing written (contract: exit status 2 is a usage error, nothing computed). Masks are
invented spheres (tests/cohort.py ``ball``)."""
from __future__ import annotations

import os
from pathlib import Path

import numpy as np
import pytest
from cohort import ball
from nifti_helpers import save_mask
from cli_helpers import call, write_manifest

from pipeline.io.names import NAME_MAX_BYTES

SHAPE, ZOOMS = (16, 16, 12), (1.0, 1.0, 1.0)


def _tree(folder: Path) -> dict:
    return {p: (p.is_dir(), p.stat().st_size, p.stat().st_mtime_ns)
            for p in sorted(folder.rglob("*"))}


def _command(name: str, out: Path, folder: Path) -> list:
    inputs = {"run": ["run", folder / "manifest.tsv", "-o", out, "-q"],
              "volumes": ["volumes", folder / "manifest.tsv", "-o", out, "-q"],
              "match": ["match", out], "fit": ["fit", out], "report": ["report", out],
              "evaluate": ["evaluate", out, "--outcomes", folder / "outcomes.tsv"],
              "demo": ["demo", out, "--subjects", "1", "-q"]}
    return inputs[name]


COMMANDS = ("run", "volumes", "match", "fit", "report", "evaluate", "demo")


@pytest.fixture(scope="module")
def inputs(tmp_path_factory):
    folder = tmp_path_factory.mktemp("outdir")
    save_mask(folder / "m.nii.gz", ball(SHAPE, (8, 8, 6), 60.0, ZOOMS).astype(np.uint8),
              np.eye(4))
    write_manifest(folder, [("G", "1", "m.nii.gz", "2024-01-01"),
                            ("G", "2", "m.nii.gz", "2024-02-01")])
    (folder / "outcomes.tsv").write_text("subject\tlesion\toutcome\nG\t1\tx\n")
    (folder / "a-file").write_text("not a folder\n")
    return folder


@pytest.mark.parametrize("command", COMMANDS)
@pytest.mark.parametrize("where", ["existing file", "under a file", "not creatable"])
def test_output_folder_problem_is_one_line_exit_2_nothing_written(inputs, command, where):
    # Reference: docs/outputs.md §1, exit status 2: usage error, nothing computed.
    out = {"existing file": inputs / "a-file", "under a file": inputs / "a-file" / "out",
           "not creatable": inputs / ("x" * (NAME_MAX_BYTES + 1)) / "out"}[where]
    before = _tree(inputs)
    code, err = call(_command(command, out, inputs))
    assert code == 2, err
    lines = err.strip().splitlines()
    assert len(lines) == 1 and lines[0].startswith(f"error: {out}"), err
    assert _tree(inputs) == before


def _unshare_works(folder: Path) -> bool:
    import subprocess

    probe = folder / "probe"
    probe.mkdir(exist_ok=True)
    done = subprocess.run(["unshare", "-rm", "sh", "-c", f"mount -t tmpfs -o ro tmpfs {probe}"],
                          capture_output=True)
    return done.returncode == 0


@pytest.mark.parametrize("command", COMMANDS)
def test_read_only_output_folder_is_one_line_exit_2_nothing_written(inputs, tmp_path, command):
    # Reference: docs/outputs.md §1, exit status 2. A real read-only file system: the folder of an
    # earlier
    # run bind-mounted read-only in a private mount namespace (util-linux unshare, mount).
    import shutil
    import subprocess
    import sys

    if shutil.which("unshare") is None or not _unshare_works(tmp_path):
        pytest.skip("cannot mount a read-only file system here (needs util-linux unshare)")
    earlier = tmp_path / "earlier"
    assert call(["run", inputs / "manifest.tsv", "-o", earlier, "-q"])[0] == 0
    view = tmp_path / "view"
    view.mkdir()
    before = _tree(earlier)
    args = " ".join(f"'{a}'" for a in _command(command, view, inputs))
    script = (f"mount --bind '{earlier}' '{view}' && mount -o remount,ro,bind '{view}' && "
              f"exec '{sys.executable}' -m pipeline {args}")
    repo = Path(__file__).resolve().parents[2]
    done = subprocess.run(["unshare", "-rm", "sh", "-c", script], capture_output=True, text=True,
                          env={**os.environ, "PYTHONPATH": str(repo)})
    assert done.returncode == 2, done.stderr
    lines = done.stderr.strip().splitlines()
    assert len(lines) == 1 and "Read-only file system" in lines[0], done.stderr
    assert _tree(earlier) == before
