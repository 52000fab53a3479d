"""demaudit's front ends: the CLI, the job runner that dispatches tiles to Dask, settings."""
