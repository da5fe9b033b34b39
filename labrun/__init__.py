"""labrun: unattended four-wave-mixing measurements on optical fibre.

Drives generic SCPI instruments through VISA, runs declarative sweep plans, reduces OSA traces to
tone and sideband powers, fits fibre parameters and stores everything in a database.
"""

from importlib.metadata import PackageNotFoundError, version

try:
    __version__ = version("labrun")
except PackageNotFoundError:  # running from a source tree that was never installed
    __version__ = "0.0.0+unknown"
