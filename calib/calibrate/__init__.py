"""Constrained calibration of the volatilities to option quotes (cvxpy)."""
