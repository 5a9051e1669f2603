"""``python -m core.batch ...``: the same command line as ``boscage batch ...``."""

import sys

from .cli import main

sys.exit(main())
