"""Pipeline layer: the outcome stages of a survival outcome (see stratagap._followup_wiring)."""

from __future__ import annotations

from .errors import InputError

__all__ = ["survival_parts"]


def survival_parts(ctx) -> dict:
    """Not built yet: the outcome is refused with a one-line message."""
    raise InputError("time-to-event outcomes (`time`) are not available in this version")
