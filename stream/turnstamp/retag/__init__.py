"""Re-tagging an archive on a Dask cluster (the library behind ``turnstamp retag``).

``plan`` lists a dataset's fragments, their outputs and those already done;
``work`` holds the per-fragment tasks a worker runs (the tagging step of
``turnstamp tag``, given prepared tables); ``cluster`` opens the embedded local
cluster or connects to an existing one; ``merge`` adds the fragments' statistics
night by night; ``run`` drives a run.
"""

__all__: list[str] = []
