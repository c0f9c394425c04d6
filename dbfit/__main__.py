"""``python -m dbfit``: the command line."""

import sys

from dbfit.interfaces.cli import main

sys.exit(main())
