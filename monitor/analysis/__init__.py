"""Analysis (pure): spectra, a block's single transform (record), running speed, orders,
bearing envelopes, and one reading's whole analysis (waveform)."""
