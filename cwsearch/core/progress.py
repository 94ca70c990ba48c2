"""Progress bars for long stages (tqdm on stderr), silenced by ``--quiet``.

>>> from cwsearch.core.progress import progress
>>> with progress(total=3, desc="demo", enabled=False) as bar:
...     bar.update(3)
"""

from __future__ import annotations

import contextlib
import sys

from tqdm import tqdm


class _Silent:
    def update(self, n=1):
        pass

    def set_postfix_str(self, s, refresh=True):
        pass

    def set_description(self, desc=None, refresh=True):
        pass


@contextlib.contextmanager
def progress(total=None, desc="", enabled=True, unit="it"):
    """Context manager yielding a bar with ``update(n)`` and ``set_postfix_str(text)``."""
    if not enabled:
        yield _Silent()
        return

    bar = tqdm(total=total, desc=desc, unit=unit, file=sys.stderr, dynamic_ncols=True, leave=False,
               mininterval=0.5)
    try:
        yield bar
    finally:
        bar.close()


__all__ = ["progress"]
