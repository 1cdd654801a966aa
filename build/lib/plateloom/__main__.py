"""``python -m plateloom``: the command line."""

import sys

from plateloom.cli import main

sys.exit(main())
