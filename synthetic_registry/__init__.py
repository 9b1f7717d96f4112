"""Seeded generator of synthetic ECG registry exports from a fictional health network."""
