"""Instrument interfaces, errors, transports and drivers for shotpair.

This package knows instruments and bytes; it knows nothing of scans, statistics or files.
"""

import logging

logging.getLogger(__name__).addHandler(logging.NullHandler())
