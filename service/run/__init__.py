"""One job on a Dask cluster: its phases (catalog, reuse, correction, tiles, outputs), the
dispatcher and faults."""
