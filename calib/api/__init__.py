"""HTTP read API for pricers."""
