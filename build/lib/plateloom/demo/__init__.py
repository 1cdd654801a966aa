"""The embedded demo screen: an invented scenario simulated into images, with its planted truth."""
