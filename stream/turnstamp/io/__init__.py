"""The shell around the core: tables from disk, wire format, sinks."""
