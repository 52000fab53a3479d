"""What a job writes: results.zarr, summary.json, report.html and figures."""
