"""For an imaging core: validate a batch, run it on all cores, and triage what failed.

This script builds a small invented cohort (three patients of the demo clinic) so that it runs
anywhere; point `manifest` at your own export instead (see examples/manifest.tsv for the columns).
Research use only: not a medical device; decisions rest with licensed clinicians.

Run: python examples/imaging_core_batch.py [WORK_FOLDER]
"""
from __future__ import annotations

import sys
import tempfile
import time
from pathlib import Path

from pipeline.cli import main
from pipeline.demo.cohort import make_demo_inputs
from pipeline.io.tsv import read_table


def main_batch() -> None:
    """The batch: --workers starts worker processes, which import this script again as a module
    (Python's multiprocessing); the guard below keeps them from running the batch themselves."""
    work = Path(sys.argv[1] if len(sys.argv) > 1 else tempfile.mkdtemp())
    inputs = make_demo_inputs(work / "inputs", n_subjects=3)
    manifest, out = inputs.manifest, work / "out"

    # 1. check: every input validated, nothing computed (exit 1 lists unusable scans)
    print("check exit status:", main(["check", str(manifest)]))

    # 2. run on all cores; a second run reuses finished scans (only changed masks are recomputed)
    for attempt in (1, 2):
        start = time.perf_counter()
        code = main(["run", str(manifest), "-o", str(out), "--events", str(inputs.events),
                     "--workers", "0", "--quiet"])
        print(f"run {attempt}: exit status {code} in {time.perf_counter() - start:.1f} s")

    # 3. triage: one row per failed input with the stage and a reason a person can act on
    errors = read_table(out / "errors.tsv")
    print(errors[["subject", "session", "stage", "reason"]].to_string(index=False)
          if len(errors) else "no failed inputs")
    masks = read_table(out / "masks.tsv")
    print(f"{len(masks)} masks read, {int(masks.components.sum())} lesion components")


if __name__ == "__main__":
    main_batch()
