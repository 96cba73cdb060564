"""Historical estimation: Kalman-filter maximum likelihood of the two-factor model."""
