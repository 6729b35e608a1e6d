"""Candidate models built on statsmodels."""
