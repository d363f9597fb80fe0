"""The file boundary: run config, exposure and hazard-curve readers, source model, fit data, run store, content cache, table schemas."""
