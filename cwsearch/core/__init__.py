"""Floor 0, the ground: what every other floor may use and which knows nothing of pulsars.

``errors`` (:class:`InputError`, every user-caused problem located by file,
row and column), ``constants`` (physical constants in seconds), ``fileio``
(atomic writes: temporary file + rename), ``progress`` (progress bars) and
``plotting`` (the shared matplotlib style, Agg backend, PNG; matplotlib is
imported only when a figure is drawn).
"""

__all__: list = []
