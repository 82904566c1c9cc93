"""Science of lightledger: small, pure functions on arrays.

Nothing here knows about Luigi, files of a visit or global state; the tasks
in :mod:`lightledger.tasks` read products, call these functions and write the
results.
"""

from importlib.metadata import PackageNotFoundError, version as _version

try:
    __version__ = _version("lightledger")
except PackageNotFoundError:  # running from a source tree that is not installed
    __version__ = "0.0.0+unknown"
