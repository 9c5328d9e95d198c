"""``python -m sounding.cli``: the same as the ``sounding`` command."""

import sys

from sounding.cli import main

sys.exit(main())
