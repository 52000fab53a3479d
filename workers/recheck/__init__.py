"""Nightly re-check: which tiles to recompute against a baseline run, and the verdicts."""
