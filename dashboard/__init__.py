"""The fleetdb dashboard: a Dash Pages app over the fleetdb library.

Build it with :func:`create_app`; nothing is built at import time.
"""

from dashboard.app import create_app

__all__ = ["create_app"]
