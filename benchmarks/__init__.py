"""Detection-quality, re-weighting and speed benchmarks of Inrush (``python -m benchmarks.run``)."""
