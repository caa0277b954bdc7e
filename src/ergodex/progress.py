"""One way to report progress, for every long call: fit, check, select, simulate, retrain.

Each takes ``progress=``:

- ``False`` or ``None``: silent (the library default; the command line decides for itself);
- ``True``: a bar from ``tqdm.auto`` (a widget in a notebook with ipywidgets, else text), on
  stderr;
- a callable ``progress(done, total)``: called with whole numbers as the work advances, the
  last call with ``done == total`` when the work completed.

What happens meanwhile is told through the library loggers (``logging.getLogger("ergodex...")``),
not through progress.
"""

from __future__ import annotations

import contextlib
from collections.abc import Callable, Iterator
from typing import Any

from ergodex.exceptions import SettingsError

__all__ = ["Progress", "reporter"]

#: What ``progress=`` accepts.
Progress = bool | None | Callable[[int, int], Any]


def _check(progress: Any, where: str) -> None:
    if progress is None or isinstance(progress, bool) or callable(progress):
        return
    raise SettingsError(
        f"{where}: progress must be True, False or a callable progress(done, total); "
        f"got {progress!r}"
    )


@contextlib.contextmanager
def reporter(
    progress: Progress, total: int, *, desc: str, unit: str = "step"
) -> Iterator[Callable[[int, int], None] | None]:
    """Yield an ``update(done, total)`` function for ``progress``, or None when silent.

    A bar is closed when the block ends, whether the work finished or failed.

    Examples
    --------
    >>> seen = []
    >>> with reporter(lambda done, total: seen.append((done, total)), 3, desc="demo") as update:
    ...     for k in range(1, 4):
    ...         update(k, 3)
    >>> seen
    [(1, 3), (2, 3), (3, 3)]
    """
    _check(progress, desc)
    if not progress:
        yield None
        return
    if progress is True:
        import importlib.util

        # tqdm.auto draws a widget in a notebook when ipywidgets is there; without it, it warns
        # and falls back to text, so go straight to the text bar
        if importlib.util.find_spec("ipywidgets") is None:
            from tqdm.std import tqdm
        else:
            from tqdm.auto import tqdm

        bar = tqdm(total=int(total), desc=desc, unit=unit, leave=False)

        def update(done: int, new_total: int) -> None:
            if new_total != bar.total:
                bar.total = int(new_total)
            bar.update(int(done) - bar.n)

        try:
            yield update
        finally:
            bar.close()
        return

    callback = progress

    def forward(done: int, new_total: int) -> None:
        callback(int(done), int(new_total))

    yield forward
