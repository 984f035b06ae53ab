"""Progress bars on an interactive terminal (tqdm); silent otherwise and with ``--quiet``.

A bar appears only when standard error is a terminal: a nightly job under cron,
a pipe or a log file gets nothing from here (the batch runner logs its own
lines instead). The long single commands follow their dask computations with
a dask callback (:class:`dask.callbacks.Callback`, local schedulers only; a
dask.distributed cluster has its own dashboard). A bar that takes notes shows the last
one (:mod:`flowpipe.notes`: the iterations of the slab being solved, say) after its
counts, so that something moves while one slab takes minutes.
"""

from __future__ import annotations

import sys
import time
import warnings
from collections.abc import Callable, Hashable
from contextlib import ExitStack

from dask.callbacks import Callback
from tqdm import tqdm

from .notes import listening

#: Seconds between two notes redrawn on a bar (the first is always shown).
NOTE_INTERVAL = 0.5


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
    notes : bool
        Show the notes of the computation (:func:`flowpipe.notes.note`) after the counts,
        at most one every :data:`NOTE_INTERVAL` seconds; a note is cleared when the bar
        advances. Never on a disabled bar.

    Warnings shown while the bar is drawn clear it first and have it redrawn below them
    (:meth:`tqdm.tqdm.external_write_mode`), so that a warning is a line of its own, not
    written over the end of the bar.
    """

    def __init__(self, progress: tqdm, counts: Callable[[Hashable], bool] | None = None,
                 per_unit: int | None = None, notes: bool = False) -> None:
        super().__init__()
        self.progress, self.counts, self.per_unit = progress, counts, per_unit
        self.done = self.tasks = 0
        self._notes = notes and not progress.disable
        self._noted: float | None = None
        self._stack = ExitStack()

    def __enter__(self) -> TaskBar:
        super().__enter__()
        if self._notes:
            self._stack.enter_context(listening(self._note))
        if not self.progress.disable:
            shown = warnings.showwarning

            def around_bar(*args, **kwargs) -> None:
                with tqdm.external_write_mode(file=self.progress.fp):
                    shown(*args, **kwargs)

            warnings.showwarning = around_bar
            self._stack.callback(setattr, warnings, "showwarning", shown)
        return self

    def _note(self, text: str) -> None:
        now = time.monotonic()
        if self._noted is None or now - self._noted >= NOTE_INTERVAL:
            self._noted = now
            self.progress.set_postfix_str(text)

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
            if self._notes:
                self.progress.set_postfix_str("", refresh=False)
            self.progress.update(shown - self.progress.n)

    def __exit__(self, *args) -> None:
        self._stack.close()
        super().__exit__(*args)
        self.progress.close()
