"""``python -m tripletkit``: the same as the ``tripletkit`` command."""

import sys

from .cli import main

sys.exit(main())
