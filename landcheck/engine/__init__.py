"""Execution: window passes on threads, processes or Dask, with ordered, bounded results."""
