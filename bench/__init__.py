"""Benchmarks of ceiling (``python -m bench``); see BENCHMARKS.md."""
