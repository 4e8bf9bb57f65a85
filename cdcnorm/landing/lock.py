"""One writer at a time: an exclusive lock on the landing area, waited for a bounded time.

The operating system releases the lock when the process ends, however it ends, so a killed run
never leaves the area locked.
"""

from __future__ import annotations

import fcntl
import os
import time
from collections.abc import Iterator
from contextlib import contextmanager
from pathlib import Path

from cdcnorm.errors import LandingBusyError


@contextmanager
def hold(meta: Path, wait: float) -> Iterator[None]:
    meta.mkdir(parents=True, exist_ok=True)
    fd = os.open(meta / "lock", os.O_RDWR | os.O_CREAT, 0o644)
    deadline = time.monotonic() + wait
    try:
        while True:
            try:
                fcntl.flock(fd, fcntl.LOCK_EX | fcntl.LOCK_NB)
                break
            except BlockingIOError:
                if time.monotonic() >= deadline:
                    raise LandingBusyError(
                        f"another run is writing to this landing area; waited {wait:g} s",
                        file=str(meta.parent),
                        hint="wait for it to finish, or give --wait more seconds",
                    ) from None
                time.sleep(0.05)
        yield
    finally:
        os.close(fd)  # closing the descriptor releases the lock
