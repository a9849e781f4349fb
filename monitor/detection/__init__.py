"""State detection (pure): margins, zones, growth, sensor health, the alarm engine, the per-machine evaluator."""
