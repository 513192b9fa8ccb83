"""``python -m bigpanel``: the same command line as the ``bigpanel`` script."""

from .interrupts import main

main()
