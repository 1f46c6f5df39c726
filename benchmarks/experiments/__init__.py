"""Experiments on leadline's selection rule (usefulness score, floor, refit cadence)."""
