"""The wire format of the event stream (ZeroMQ multipart messages).

``message``    the format specification, the header model, refusal wording
``columns``    the body's columns: accepted Arrow types, conversion to the core's dtypes
``encode``     frames from columns or an ``EventBatch``
``decode``     the validating decoder: frames to a ``DecodedMessage`` or a ``WireError``
``sequence``   per-source sequence bookkeeping (gaps, late, duplicates, restarts)
``publisher``  ``EventPublisher``: send batches from an event builder in a few lines
"""
