"""Cross-validation of structures: the result type and the bridge to ArviZ's comparison."""
