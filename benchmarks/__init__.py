"""Benchmarks of leadline: label efficiency of the estimation core (see ``labels.py``)."""
