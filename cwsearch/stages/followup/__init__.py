"""The followup stage."""
