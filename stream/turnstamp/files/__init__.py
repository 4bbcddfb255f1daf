"""The files turnstamp reads and writes.

``schemas``         Arrow schemas of the event stream and of every output, with units
``writer``          one output stream as rotating, crash-safe Arrow IPC stream files
``conform``         batches fitted to a stream's schema
``durable``         atomic small files, publishing without replacing, locks, fsync
``reader``          a stream's files in write order; reading complete and partial files
``arrow_metadata``  the two fields of IPC message metadata pyarrow does not expose
``recovery``        ending killed files by truncation at start-up; leftover temporaries
``outputs``         pipeline results as Arrow tables of the output schemas
``ledger``          the per-message commit: archive rows, rejects rows, one ledger row
``inputs``          TOML/JSON spin-model and template files with exact decimals
``bundled``         leap seconds, Earth orientation, JPL kernel from installed packages
"""
