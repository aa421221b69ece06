"""The outcome of one plausibility filter: falsy on reject, with the measured value, the limit and a reason."""

from __future__ import annotations

import math
from dataclasses import dataclass
from typing import Any


@dataclass(frozen=True)
class Verdict:
    """The outcome of one filter. Falsy when the candidate is rejected.

    Attributes
    ----------
    name : str
        Filter name (``"scale"``, ``"surface"``, ``"overlap"``, ``"gap"``, ``"objects"``, ``"seam"``,
        ``"duplicate"``).
    passed : bool
    value : float or None
        What was measured (None when it cannot be measured, e.g. a box above the horizon).
    limit : float
        The limit it was compared with.
    reason : str
        One sentence: the value, the limit and, on rejection, why.
    """

    name: str
    passed: bool
    value: float | None
    limit: float
    reason: str

    def __bool__(self) -> bool:
        return self.passed

    def to_dict(self) -> dict[str, Any]:
        """JSON-ready dict; a non-finite value becomes None (JSON has no infinity)."""
        value = self.value if self.value is None or math.isfinite(self.value) else None
        return {"name": self.name, "passed": self.passed, "value": value, "limit": self.limit, "reason": self.reason}
