"""Layer 4, tables: streaming readers and writers for CSV, JSON Lines and Parquet, column mapping,
and the one ordered, bounded process pool (interpret_many runs on it)."""
