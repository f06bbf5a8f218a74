"""Whether a process of this host still runs: how a later start tells a killed run's leftovers."""

from __future__ import annotations

import os

__all__ = ["process_running"]


def process_running(pid: int) -> bool:
    """True when process ``pid`` of this host exists (another user's process counts as running)."""
    try:
        os.kill(pid, 0)
    except ProcessLookupError:
        return False
    except PermissionError:  # another user's process
        return True
    return True
