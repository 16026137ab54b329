"""frostvane detector: reads tiles, extracts features, runs exported models."""
