"""Progress bars for the commands that can take more than a few seconds (run, validate,
sensitivity, PSA): shown on a terminal, silent when stderr is not one (a pipe, a log file,
a test), so output that is read by programs never carries them."""
from __future__ import annotations

import sys

from tqdm import tqdm


def progress(total: int | None, what: str, unit: str, *, shown: bool = True,
             initial: int = 0) -> tqdm:
    """A bar over `total` items (None: a running count), on stderr when it is a terminal."""
    return tqdm(total=total, initial=initial, desc=what, unit=unit, leave=False,
                disable=not shown or not sys.stderr.isatty())
