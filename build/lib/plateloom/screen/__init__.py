"""The per-screen stage (fan-in over plates): model wells, batch correction, effects, REML,
dose-response, design check."""
