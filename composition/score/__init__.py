"""Score: exact diagonal midranks (kernels), row sampling, statistics and labels (docs/methods.md §4)."""
