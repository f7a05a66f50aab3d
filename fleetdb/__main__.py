"""``python -m fleetdb``."""

from fleetdb.cli import main

main()
