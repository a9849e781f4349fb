"""Analysis (pure): spectra, running speed, orders, bearing frequencies, one reading's analysis."""
