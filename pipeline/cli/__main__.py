"""``python3 -m pipeline.cli``: the same as the ``matchbay`` console command."""

import sys

from pipeline.cli import main

sys.exit(main())
