"""The QA report, built from the tables in OUT (never recomputes)."""
