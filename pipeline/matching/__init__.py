"""Stage 2 (matching): components of a subject's sessions -> links and lesion tracks."""
