"""Shared ground: float precision, pytrees, random keys, validators and safe files."""
