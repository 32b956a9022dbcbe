"""Measuring each run: the host, metrics, expectations, counters, provenance, steady state."""
