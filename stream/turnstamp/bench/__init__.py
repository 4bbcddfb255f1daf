"""Benchmarks (``turnstamp bench``): never a unit test.

``suite`` runs the sections and checks each figure against its target;
``kernel`` measures the numerical hot paths (tagging, moments) and ``service``
the whole service from ZeroMQ into Arrow files, each against a baseline taken in
the same run.
"""

__all__: list[str] = []
