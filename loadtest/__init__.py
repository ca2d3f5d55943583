"""Load generator and benchmark scripts that print figures (nothing here asserts on them)."""
