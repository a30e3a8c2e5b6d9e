"""Progress bars for long work, shown only when asked for.

Library functions take ``progress=False`` and pass it here; the command line switches it
on when standard error is a terminal and ``--quiet`` is not given. No global state.
"""

from __future__ import annotations

from typing import Iterable


def progress_bar(iterable: Iterable | None = None, *, total: int | None = None, desc: str | None = None,
                 enabled: bool = False, unit: str = "it"):
    """Wrap `iterable` in a tqdm bar on standard error when `enabled`, else return a silent stand-in.

    Examples
    --------
    >>> sum(progress_bar(range(4)))
    6
    """
    from tqdm import tqdm

    return tqdm(iterable, total=total, desc=desc, disable=not enabled, unit=unit, leave=False,
                dynamic_ncols=True)
