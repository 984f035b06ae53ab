"""Progress bars on an interactive terminal (tqdm); silent otherwise and with ``--quiet``.

A bar appears only when standard error is a terminal: a nightly job under cron,
a pipe or a log file gets nothing from here (the batch runner logs its own
lines instead). The long single commands follow their dask computations with
a dask callback (:class:`dask.callbacks.Callback`, local schedulers only; a
dask.distributed cluster has its own dashboard).
"""

from __future__ import annotations

import sys
from collections.abc import Callable, Hashable

from dask.callbacks import Callback
from tqdm import tqdm


def on_terminal(quiet: bool = False) -> bool:
    """Whether to show progress: standard error is a terminal and ``quiet`` is not asked."""
    return not quiet and sys.stderr.isatty()


def bar(total: int, unit: str, quiet: bool = False, desc: str | None = None) -> tqdm:
    """A tqdm bar on standard error: done, rate and time left; disabled off a terminal."""
    return tqdm(total=total, unit=unit, desc=desc, file=sys.stderr, disable=not on_terminal(quiet),
                smoothing=0.1)


def key_name(key: Hashable) -> str:
    """The name of a dask key (a tuple's first item)."""
    return str(key[0] if isinstance(key, tuple) else key)


class TaskBar(Callback):
    """Advance a bar as the dask tasks it counts finish; closed when the context ends.

    Parameters
    ----------
    progress : tqdm.tqdm
        The bar; its ``total`` is in the units shown (slabs, time slices).
    counts : callable, optional
        Whether a task (by its key) is one of those counted; without it, each
        computation counts as one unit (one time slice read, say).
    per_unit : int, optional
        Counted tasks per unit of the bar; by default the counted tasks of each
        computation spread evenly over the bar's total (the tasks of writing
        ``N`` variables of ``S`` slabs advance it by one slab every ``N``).
    """

    def __init__(self, progress: tqdm, counts: Callable[[Hashable], bool] | None = None,
                 per_unit: int | None = None) -> None:
        super().__init__()
        self.progress, self.counts, self.per_unit = progress, counts, per_unit
        self.done = self.tasks = 0

    def _start(self, dsk) -> None:
        if self.counts is not None:
            self.tasks += sum(1 for key in dsk if self.counts(key))

    def _finish(self, dsk, state, errored) -> None:
        if self.counts is None and not errored and self.progress.n < (self.progress.total or 0):
            self.progress.update(1)

    def _posttask(self, key, result, dsk, state, id) -> None:  # noqa: A002 (dask's name)
        if self.counts is None or not self.counts(key):
            return
        self.done += 1
        per_unit = self.per_unit or max(self.tasks, 1) / max(self.progress.total or 1, 1)
        shown = min(int(self.done / per_unit), self.progress.total or 0)
        if shown > self.progress.n:
            self.progress.update(shown - self.progress.n)

    def __exit__(self, *args) -> None:
        super().__exit__(*args)
        self.progress.close()
