"""Numeric core: two-factor model formulas, Black-76, spreads, simulation (numpy, scipy only)."""
