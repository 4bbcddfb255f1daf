"""turnstamp: barycentric phase tagging and live periodicity monitoring.

The numerical core lives in :mod:`turnstamp.core` and does no I/O; the shell
(wire format, sinks, service, command line) lives in :mod:`turnstamp.io` and the
top-level modules.
"""

__version__ = "0.1.0"
