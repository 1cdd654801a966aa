"""Self-contained HTML pages of the plate and screen stages."""
