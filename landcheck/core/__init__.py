"""The core: run_audit (in memory), audit (the output folder), their settings, and the slope raster pass."""
