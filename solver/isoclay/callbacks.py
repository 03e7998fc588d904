"""Progress and stop callbacks that long loops take: the ground floor every layer may import.

A loop reports ``progress(stage, fraction, info)`` and calls ``check_stop(should_stop, stage)``
between iterations; the service turns them into events, the command line into a progress bar.
Nothing here knows about the UI.
"""

from __future__ import annotations

from typing import Callable, Protocol

from .errors import Cancelled


class Progress(Protocol):
    def __call__(self, stage: str, fraction: float, info: dict) -> None: ...


def no_progress(stage: str, fraction: float, info: dict) -> None:
    """A progress callback that ignores everything."""


def never_stop() -> bool:
    return False


def check_stop(should_stop: Callable[[], bool], stage: str) -> None:
    """Raise Cancelled when the user asked to stop; called between iterations of long loops."""
    if should_stop():
        raise Cancelled(f"cancelled during {stage}; nothing was written")
