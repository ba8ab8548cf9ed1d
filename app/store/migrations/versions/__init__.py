"""Revision files, one schema change each, applied in ``down_revision`` order."""
