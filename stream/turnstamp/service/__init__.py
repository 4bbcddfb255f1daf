"""The live service (``turnstamp run``), one room per concept.

``loop``        the ``Service`` object and its receive -> decode -> feed -> write loop
``sockets``     intake, control and publish sockets; addresses checked first
``intake``      draining, decoding and sequence checks of each message
``checkpoint``  the state between two messages, in ``checkpoint.arrow`` (its own thread)
``recovery``    resuming after a crash: replay in lockstep with the ledger, cut the uncommitted
``control``     the control commands (a ROUTER socket: any client, any frames)
``lifecycle``   banner, summary, and the "failed" status when the service fails
``status``      the status document: ``status.json`` and the PUB updates
``upkeep``      model and template reload, barycentre tables built ahead of need
``startup``     configuration -> pipeline and output writers

The per-message commit (``files.ledger``) and the tables it writes
(``files.outputs``) are shared with offline tagging.
"""

__all__: list[str] = []
