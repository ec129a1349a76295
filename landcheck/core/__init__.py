"""The core: one streamed audit pass from inputs to verdicts, and the slope raster."""
