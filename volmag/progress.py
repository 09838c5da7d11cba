"""Progress lines on stderr for long work: shown on a terminal, silent otherwise."""
from __future__ import annotations

import sys
import time


class Progress:
    """Writes short progress lines to stderr. `enabled=None` means: only when
    stderr is a terminal."""

    def __init__(self, enabled: bool | None = None):
        self.enabled = sys.stderr.isatty() if enabled is None else enabled
        self.t0 = time.perf_counter()

    def __call__(self, message: str) -> None:
        if self.enabled:
            print(f"[{time.perf_counter() - self.t0:7.1f} s] {message}", file=sys.stderr, flush=True)


QUIET = Progress(False)
