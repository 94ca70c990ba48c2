"""Floor 1, the data: the array model and the files it is read from.

``model`` (:class:`Pulsar`, :class:`Array`, per-pulsar noise settings),
``dataset`` (the ECSV dataset folder: reader, writer, validation),
``catalog`` (galaxy catalogues), ``cosmology`` (distance <-> redshift,
Planck 2018) and ``plots`` (the dataset overview figure). The bundled
invented demo dataset (``demo/``) and galaxy catalogue
(``demo_galaxies.ecsv``) are package data here.
"""

__all__: list = []
