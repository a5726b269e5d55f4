"""Stage 3 (growth): growth laws, phases, per-lesion, group and population fits, evaluation."""
