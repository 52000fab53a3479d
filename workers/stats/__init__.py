"""Mergeable dh summaries, their merge and robust inference; exact accuracy of residuals."""
