"""The hosts stage."""
