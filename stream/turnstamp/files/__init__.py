"""The files turnstamp reads and writes.

``schemas``   Arrow schemas of the event stream and of every output, with units
``writer``    rotating crash-safe Arrow writers (``conform``: batches fitted to a
              schema; ``durable``: atomic small files, publishing, locks)
``reader``    listing a stream's files, reading complete and partial files
``recovery``  finishing footer-less files at start-up
``arrow_metadata``  the two facts of Arrow IPC metadata that pyarrow does not expose
``inputs``    TOML/JSON spin-model and template files with exact decimals
``bundled``   leap seconds, Earth orientation, JPL kernel from installed packages
"""
