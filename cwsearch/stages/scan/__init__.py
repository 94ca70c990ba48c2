"""The scan stage."""
