"""The progress record that training reports to a caller's callback (the CLI draws a bar from it)."""

from __future__ import annotations

from dataclasses import dataclass


@dataclass(frozen=True)
class FitProgress:
    """One training step done. ``phase`` is ``"denoiser"`` or ``"verifier"``; ``total`` is None when the
    run is limited by time; ``elapsed_s`` is NaN when not measured."""

    phase: str
    step: int
    total: int | None
    loss: float
    elapsed_s: float
