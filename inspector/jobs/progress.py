"""Progress reporting handed to the jobs: a bar on stderr when it is a terminal."""

from __future__ import annotations

import sys

from tqdm import tqdm


def progress_bar(total: int | None, desc: str) -> tqdm:
    """A progress bar on stderr, silent when stderr is not a terminal."""
    return tqdm(total=total, desc=desc, unit="frame", leave=False, file=sys.stderr,
                disable=not sys.stderr.isatty(), dynamic_ncols=True)
