"""Loam: data preparation for low-resource speech corpora."""

__version__ = "0.1.0"
