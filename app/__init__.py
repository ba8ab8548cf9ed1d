"""Helmshift: a local dashboard for tracking forced chief-executive turnover."""

#: the one place the version is written (pyproject.toml reads it; footer, exports, packs and the engine tag use it)
__version__ = "0.2.0.dev0"
