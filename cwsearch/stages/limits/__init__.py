"""The limits stage."""
