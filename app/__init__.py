"""Helmshift: a local dashboard for tracking forced chief-executive turnover."""

__version__ = "0.1.0"
