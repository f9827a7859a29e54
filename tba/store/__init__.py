"""Layer 5: the HDF5 store of a scan, the driver that fills it, and merging shards."""
