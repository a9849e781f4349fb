"""Natural frequencies (pure): impact tests, run-up and coast-down passages, mode shift, skip bands."""
