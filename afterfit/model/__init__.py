"""The statistical kernel of afterfit: numpy, scipy, pandas and patsy only (no widget imports)."""
