"""Progress bars for long work (Monte Carlo, sweeps, long plans): tqdm on a terminal, none in tests or pipes."""

from __future__ import annotations

import sys

__all__ = ["progress_bar"]


def progress_bar(iterable, total=None, show=None, desc=None, unit="it"):
    """``iterable`` wrapped in a tqdm bar on stderr when ``show`` (default: stderr is a terminal).

    Examples
    --------
    >>> list(progress_bar(range(3), show=False))
    [0, 1, 2]
    """
    show = sys.stderr.isatty() if show is None else bool(show)
    if not show:
        return iterable
    from tqdm import tqdm  # noqa: PLC0415 - tqdm is only needed when a bar is shown

    return tqdm(iterable, total=total, desc=desc, unit=unit, leave=False, file=sys.stderr)
