"""The command line, one module per command.

``main`` assembles the parser and holds the one error handler; every other
module is one command (``tag``, ``run``, ``demo``, ``simulate``, ``model``,
``table``, ``inspect``, ``report``, ``watch``, ``stack``, ``template``,
``bench``, ``schemas``) exposing ``add_parser(subparsers)`` and
``run(args) -> int``; ``common`` holds options several commands share.
"""

__all__: list[str] = []
