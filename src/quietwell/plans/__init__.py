"""Measurement plans of a levitated-particle characterisation."""
