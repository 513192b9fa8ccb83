"""``python -m bigpanel``: the same command line as the ``bigpanel`` script."""

import sys

from .cli import main

sys.exit(main())
