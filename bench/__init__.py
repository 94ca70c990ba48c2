"""Benchmarks (``python -m bench.<name>``): each prints its measured figures
and the ratio to a reference measured in the same run. Not tests."""
