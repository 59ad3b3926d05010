"""``python -m tracechain``: the same command line as the ``tracechain`` script."""

import sys

from .cli import main

sys.exit(main())
