"""``python -m labwatch`` is the ``labwatch`` command."""

import sys

from labwatch.cli import main

sys.exit(main())
