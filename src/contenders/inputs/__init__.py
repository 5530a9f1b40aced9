"""What a run reads: configuration, the data table, the candidate programs."""
