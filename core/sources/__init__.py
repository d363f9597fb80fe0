"""Seismic sources: magnitude-frequency distributions, finite ruptures, source-to-site distances."""
