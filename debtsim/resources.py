"""What the machine can give a run: the memory free for a new allocation.

Inputs and settings whose cost grows without bound (a huge book, a huge shot
count) are refused before they are attempted when their estimated memory
exceeds what is free, with both figures named.
"""

from __future__ import annotations

__all__ = ["available_memory", "bytes_text"]


def available_memory() -> int | None:
    """Return the bytes of memory available to a new allocation, or None when unknown.

    Read from ``MemAvailable`` in ``/proc/meminfo`` (Linux: free memory plus
    what the kernel can reclaim at once); None elsewhere.
    """
    try:
        with open("/proc/meminfo", encoding="ascii") as fh:
            for line in fh:
                if line.startswith("MemAvailable:"):
                    return int(line.split()[1]) * 1024
    except (OSError, ValueError, IndexError):
        return None
    return None


def bytes_text(count: float) -> str:
    """Return a byte count for people: ``"1.5 GB"``, ``"320 MB"``."""
    if count >= 2**30:
        return f"{count / 2**30:,.1f} GB"
    return f"{count / 2**20:,.0f} MB"
