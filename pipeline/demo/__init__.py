"""The invented demo cohort: stories with known truth, shapes, files."""
