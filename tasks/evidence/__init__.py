"""Evidence: metrics, Procrustes alignment, cross-fitted vectors and the downstream comparison against baselines."""
