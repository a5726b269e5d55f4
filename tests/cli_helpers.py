"""Running the command line inside a test: a manifest writer, the call, the errors table."""
from __future__ import annotations

import contextlib
import io
from pathlib import Path

from pipeline.cli import main
from pipeline.io.tsv import read_table

HEADER = ("subject", "session", "mask", "date")


def write_manifest(folder: Path, rows, header=HEADER, name="manifest.tsv") -> Path:
    path = folder / name
    path.write_text("\n".join("\t".join(r) for r in [header, *rows]) + "\n")
    return path


def call(args) -> tuple[int, str]:
    """Run the command line in this process; return (exit status, stderr)."""
    err = io.StringIO()
    with contextlib.redirect_stderr(err):
        code = main([str(a) for a in args])
    return code, err.getvalue()


def errors_of(out: Path):
    return read_table(out / "errors.tsv")
