"""Tallyward: vehicle detector count monitoring."""

__version__ = "0.1.0"
