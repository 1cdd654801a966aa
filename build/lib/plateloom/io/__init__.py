"""Reading images (one interface, one reader per source) and writing tables with provenance."""
