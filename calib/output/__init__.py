"""Output layer: what calib shows people (HTML pages, figures, tables, terminal text)."""
