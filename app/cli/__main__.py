"""``python -m app.cli``: the ``rawproof`` command."""

import sys

from app.cli import main

sys.exit(main())
