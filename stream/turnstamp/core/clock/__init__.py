"""Quick-look check of the clock chain: is tonight's pulse where the template says?

The rooms, in the order the check runs:

* :mod:`.chunks`: cut the night into chunks and fit the template offset of each;
* :mod:`.series`, :mod:`.wobble`, :mod:`.smear`: fit constant, drift, step, wobble
  and jitter models to the offset series, and the broadening of the night profile;
* :mod:`.mistakes`: the usual time-keeping mistakes an offset may match;
* :mod:`.diagnose`: compare the models and judge, with :mod:`.rating` for the status;
  :mod:`.verdict` is the result and its thresholds, :mod:`.wording` its lines.

The numerical core only: no I/O, no clock.
"""

__all__: list[str] = []
