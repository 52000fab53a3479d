"""Where jobs and schedules are kept (SQLite or memory), behind small contracts."""
