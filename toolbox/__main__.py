"""``python -m toolbox``: the same command line as ``pairspread``."""

import sys

from .cli import main

sys.exit(main())
