"""The ``helmshift`` command line, over the same functions the dashboard uses.

Every command takes ``--db`` (a file path or SQLAlchemy URL; ``HELMSHIFT_DB`` likewise). With ``--json`` it
prints one JSON object on stdout. Errors are one clear sentence on stderr and a non-zero exit status."""

from app.cli.common import CommandError, open_store
from app.cli.parser import build_parser, main

__all__ = ["CommandError", "build_parser", "main", "open_store"]
