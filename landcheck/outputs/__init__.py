"""Outputs: atomic writers for tables, rasters and JSON."""
