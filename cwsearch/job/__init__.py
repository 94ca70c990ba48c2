"""Floor 5, the whole job: run files, the run folder, the pipeline over the stage registry and the report.

``config`` (TOML run files checked against the stages' option classes),
``runfolder`` (layout, ``.stage.json`` records, hashes, provenance, seeds,
the lock), ``pipeline`` (the stages of :data:`cwsearch.stages.STAGES` in
order, with skipping and resume) and ``report`` (``report.html`` and the
headline).
"""

__all__: list = []
