"""The plant's model: machines, points and modes (registry), decoded readings, units."""
