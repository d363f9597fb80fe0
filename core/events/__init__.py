"""Event-based portfolio: stochastic event sets, correlated ground-motion fields, event and year losses, EP curves."""
