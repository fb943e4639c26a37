"""``python -m nl_unwarp``: the same as the ``nl-unwarp`` command."""

import sys

from .cli import main

sys.exit(main())
