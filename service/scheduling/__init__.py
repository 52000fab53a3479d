"""Scheduled runs (cron, time zones, leases) and their webhook notifications."""
