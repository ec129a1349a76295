"""Verdicts: per-parcel sums and rules to verdicts; confidence, capability and reclassification."""
