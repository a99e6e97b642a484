"""What a run produces: the per-trial records, tables and fronts, and the offline report."""
