"""Run: the resumable scan driver, work units, Dask execution, progress, interrupts and the plan."""
