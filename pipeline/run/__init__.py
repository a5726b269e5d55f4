"""The only layer that names files in OUT: executors, cache, per-stage wiring, provenance."""
