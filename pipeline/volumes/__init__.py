"""Stage 1 (volumes): label mask + affine -> one row per connected component."""
