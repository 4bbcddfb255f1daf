"""Offline tagging: events in, the archive's phase columns out (the library behind
``turnstamp tag`` and ``turnstamp.tag_events``).

``run`` drives a run over an event file or a table (one pass, bounded memory,
outputs published only on success); ``batchtag`` tags one record batch, the
step a re-tagging job maps over dataset fragments; ``inputs`` reads event files
batch by batch; ``times`` holds time conventions and the plausibility checks;
``tables`` builds barycentre tables as days appear; ``outputs`` writes the
archive and rejects files; ``summary`` says what a run did.
"""

__all__: list[str] = []
