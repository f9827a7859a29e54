"""Layer 4: scans: run files, the chunk of consecutive radii as the unit of work, and the
backends that compute chunks (in process, local processes, dask.distributed)."""
