"""One module per command: ``DESCRIPTION``, ``EXAMPLE``, ``add_arguments(parser)``, ``run(args)``.

Command modules import numerical code inside ``run`` only (keeps ``--help`` fast).
"""


__all__ = []
