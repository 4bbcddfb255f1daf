"""``turnstamp watch``: a live terminal view of a running service.

Theory of operation
-------------------
The service describes itself once a second in ``status.json`` (replaced
atomically) and, when ``output.publish_endpoint`` is set, publishes the same JSON
on a ZeroMQ PUB socket as two frames, topic ``b"status"`` and the UTF-8 JSON.
``watch`` reads either source (``source``) and shows each status (``loop``,
``display``). On a terminal the screen is drawn with ``rich`` (``screen``): the
totals first, then a row per target, recipe and window with the significance as
a bar and the pulse profile beside it, redrawn in place with the age of the last
update. Anywhere else, or with ``--ascii``, it is plain text (``text``): each new
status as a block, blocks separated by a blank line, no escape codes, ASCII only.

Every key of the status may be missing or null (older or newer services, a
target still warming up): the view shows what is there (``fields``).
"""

from .loop import run_watch, watch_main
from .source import read_status_file
from .text import profile_bars, render_status

__all__ = ["render_status", "profile_bars", "run_watch", "watch_main", "read_status_file"]
