"""Hazard zones: easements, flood polygons, HAND and sea-level rise, prepared for the overlay."""
