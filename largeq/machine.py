"""What this computer offers now: memory free for a new allocation (one place; every layer may import it)."""

from __future__ import annotations

__all__ = ["available_bytes"]


def available_bytes() -> int:
    """Memory available to a new allocation now, in bytes (psutil's 'available': free plus reclaimable)."""
    import psutil

    return int(psutil.virtual_memory().available)
