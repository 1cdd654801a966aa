"""The per-plate stage (fan-in over wells): well summaries, exclusions, positional correction,
normalization, plate QC."""
