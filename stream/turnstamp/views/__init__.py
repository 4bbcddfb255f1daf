"""What people look at: the night report (``views.report``: an HTML page and PNG
figures built from an output folder), the live terminal view of a running service
(``views.live``) and a progress helper for long commands (``views.progress``).

Views only read: the service's files and its published status. They never feed
the pipeline or write anything but their own pages.
"""

__all__: list[str] = []
