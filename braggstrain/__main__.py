"""``python -m braggstrain``: the command line."""

import sys

from braggstrain.cli import main

sys.exit(main())
