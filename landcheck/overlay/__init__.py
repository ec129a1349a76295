"""Overlay: exact cell coverage of parcels, reduced to per-parcel sums."""
