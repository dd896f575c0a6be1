"""The console command ``fisherwalk``, model files, demo scenarios."""

from .command import main

__all__ = ["main"]
