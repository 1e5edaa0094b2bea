"""Checks of a built prior: what it implies for a planned study (operating characteristics)."""
