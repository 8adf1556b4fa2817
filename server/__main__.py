"""``python -m pellucid``: the same command line as ``pellucid``."""

import sys

from pellucid.cli import main

sys.exit(main())
