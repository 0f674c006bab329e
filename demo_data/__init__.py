"""Generators for the invented demo lab and the synthetic data used in tests."""
