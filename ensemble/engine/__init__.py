"""Internal: the ensemble engine (filter, weights, anomaly detection, the time scale)."""
