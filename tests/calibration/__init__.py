"""Calibration of the inference on many simulated null studies (slow)."""
