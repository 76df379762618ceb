"""Presence/background estimators (scikit-learn compatible, 2-D tables only)."""
