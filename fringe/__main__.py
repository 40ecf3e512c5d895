"""Allow ``python -m fringe``."""

import sys

from fringe.cli import main

sys.exit(main())
