"""``python -m firnline`` is the ``firnline`` command."""

import sys

from .cli import main

sys.exit(main())
