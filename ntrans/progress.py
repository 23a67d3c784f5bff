"""Progress reporting for long steps.

The library never prints on its own: a bar is shown only when the caller asks for it
(``progress=True``, as the command line does unless ``-q``).  Bars go to stderr.
"""

from __future__ import annotations

from collections.abc import Iterable, Iterator
from typing import TypeVar

from tqdm.auto import tqdm

T = TypeVar("T")


def track(items: Iterable[T], *, total: int | None = None, desc: str = "", enabled: bool = False) -> Iterator[T]:
    """Yield from ``items``, showing a progress bar on stderr when ``enabled``."""
    if not enabled:
        yield from items
        return
    yield from tqdm(items, total=total, desc=desc, unit="tile", leave=False, dynamic_ncols=True)
