"""Statistics core: vectorised numpy/scipy functions with no I/O."""
