"""``python -m scalewright``: the same command line as the ``scalewright`` script."""

import sys

from scalewright.cli import main

sys.exit(main())
