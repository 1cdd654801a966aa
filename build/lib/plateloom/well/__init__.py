"""The per-well stage (fan-out): illumination, segmentation, measures, tracking, track
statistics, collective readouts."""
