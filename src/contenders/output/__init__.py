"""What a run writes: the report, its figures, tables and number formatting."""
