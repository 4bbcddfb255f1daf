"""Pure numerical core: time scales, barycentre, spin model, statistics.

Nothing in this package imports zmq or pyarrow, opens a file or socket, or
reads the wall clock. Tables (leap seconds, Earth orientation, ephemerides)
are handed in as data by the shell.
"""

__all__: list[str] = []
