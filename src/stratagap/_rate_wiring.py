"""Pipeline layer: the outcome stages of a rate outcome (see stratagap._followup_wiring)."""

from __future__ import annotations

from .errors import InputError

__all__ = ["rate_parts"]


def rate_parts(ctx) -> dict:
    """Not built yet: the outcome is refused with a one-line message."""
    raise InputError("rate outcomes (`person_time`) are not available in this version")
