"""``python -m sparseindex``: the same as the ``sparseindex`` command."""

import sys

from .cli import main

sys.exit(main())
