"""Tests of grouplevel; shared helpers in conftest.py, reference data in reference_data.py."""
