"""Shared ground: float precision, pytrees, random keys, validators, safe files and JSON."""
