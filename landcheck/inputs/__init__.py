"""Inputs: open and validate the DEM, parcel and hazard layers, and the rulebook."""
