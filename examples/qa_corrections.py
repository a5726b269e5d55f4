"""For QA staff: correct one lesion link and see exactly what changed.

Usually the corrections come from report.html (tick "wrong" or move a component, then "Save
corrections.tsv"); here the same file is written by hand for an invented demo patient.
Research use only: not a medical device; decisions rest with licensed clinicians.

Run: python examples/qa_corrections.py [WORK_FOLDER]
"""
from __future__ import annotations

import sys
import tempfile
from pathlib import Path

from pipeline.cli import main
from pipeline.io.tsv import read_table

work = Path(sys.argv[1] if len(sys.argv) > 1 else tempfile.mkdtemp())
out = work / "out"
main(["demo", str(out), "--subjects", "3", "--quiet"])
before = read_table(out / "longitudinal.tsv")

# Pick the demo's split (subject C03): detach the second part into a lesion of its own.
matches = read_table(out / "matches.tsv")
split = matches[(matches.subject == "C03") & (matches.relation == "splits")].iloc[-1]
corrections = work / "corrections.tsv"
corrections.write_text("subject\tsession\tcomponent\tlesion\tnote\n"
                       f"C03\t{split.session_to}\t{int(split.component_to)}\tnew\t"
                       "reviewer: separate lesion, not a split\n")
print(corrections.read_text())

main(["match", str(out), "--corrections", str(corrections)])
main(["fit", str(out), "--events", str(out / "inputs" / "events.tsv")])
after = read_table(out / "longitudinal.tsv")

changed = after[after.corrected]
print("rows corrected by hand:")
print(changed[["subject", "lesion", "session", "volume_mm3", "status", "components"]]
      .to_string(index=False))
print(f"lesion tracks of C03: {before[before.subject == 'C03'].lesion.nunique()} before, "
      f"{after[after.subject == 'C03'].lesion.nunique()} after")
