"""``python -m flowpipe``: the same as the ``flowpipe`` command."""

import sys

from .cli import main

sys.exit(main())
