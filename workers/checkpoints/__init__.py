"""Surveyed checkpoints: reading, sampling the test model, grading against standards."""
