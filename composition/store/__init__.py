"""Store: the scan file, its schema, its journal and the one atomic file writer."""
