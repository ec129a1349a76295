"""Terrain facts from the DEM: slope, slope classes, hydrology and DEM error fields."""
