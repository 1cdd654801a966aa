"""Shipped assets (demo scenario, plate formats, report style), inside the package as plateloom.resources."""
