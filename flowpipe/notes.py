"""Notes from inside long computations, for whoever shows them (:mod:`flowpipe.progress`).

A kernel that may run for minutes on one slab (the conjugate-gradient iterations of
the regional solver, the factorisation of a solver) calls :func:`note` now and then; a
listener registered with :func:`listening` - the progress bar of a command on a
terminal - gets the text. Without a listener a note costs one check and builds no
text. Imports nothing, so the kernels stay free of the display layer. Shared by the
dask threads (a listener may be called from any of them).
"""

from __future__ import annotations

from collections.abc import Callable, Iterator
from contextlib import contextmanager

_listeners: list[Callable[[str], None]] = []


def note(make: Callable[[], str]) -> None:
    """Pass the text ``make()`` to every listener; nothing (not even ``make``) without one."""
    if _listeners:
        text = make()
        for listener in tuple(_listeners):
            listener(text)


@contextmanager
def listening(listener: Callable[[str], None]) -> Iterator[None]:
    """Call ``listener(text)`` for every note made while the context lasts."""
    _listeners.append(listener)
    try:
        yield
    finally:
        _listeners.remove(listener)
