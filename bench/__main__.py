"""``python -m bench``: the performance benchmark (see bench/run.py)."""

import sys

from bench.run import main

sys.exit(main())
