"""``python -m app.cli``: the same as the ``helmshift`` command."""

import sys

from app.cli.parser import main

sys.exit(main())
