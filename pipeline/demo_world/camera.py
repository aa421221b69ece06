"""The demo world's camera: a level pinhole camera over a flat ground plane.

Coordinates: ``X`` metres to the right of the camera, ``Y`` metres above the ground, ``Z`` metres
ahead (depth). Image coordinates are continuous COCO coordinates: pixel column ``c`` covers
``[c, c + 1)``, so the centre of pixel ``(row, col)`` is at ``(row + 0.5, col + 0.5)``.

References
----------
Hartley, Zisserman, "Multiple View Geometry in Computer Vision", 2nd ed., 2004 (pinhole projection:
a point at depth Z and height offset dY below the camera projects dY * f / Z rows below the
principal point; with pitch 0 the principal row is the horizon).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np


@dataclass(frozen=True)
class Camera:
    """A level pinhole camera (pitch, roll and yaw 0) at ``camera_height_m`` above the road.

    ``horizon_row`` is the continuous image row of the horizon (the principal row).
    """

    width: int
    height: int
    focal_px: float
    camera_height_m: float
    horizon_row: float

    def __post_init__(self) -> None:
        if self.width <= 0 or self.height <= 0:
            raise ValueError(f"image size must be positive, got {self.width}x{self.height}")
        if self.focal_px <= 0 or self.camera_height_m <= 0:
            raise ValueError(f"focal_px and camera_height_m must be > 0, got {self.focal_px}, {self.camera_height_m}")
        if not 0 < self.horizon_row < self.height:
            raise ValueError(f"horizon_row must lie inside the image, got {self.horizon_row}")

    @property
    def centre_col(self) -> float:
        """Continuous column of the principal point (the image centre)."""
        return self.width / 2.0

    def col(self, x_m: np.ndarray | float, z_m: np.ndarray | float) -> np.ndarray:
        """Image column of lateral position ``x_m`` at depth ``z_m``."""
        return self.centre_col + self.focal_px * np.asarray(x_m, dtype=np.float64) / z_m

    def row(self, y_m: np.ndarray | float, z_m: np.ndarray | float) -> np.ndarray:
        """Image row of a point ``y_m`` metres above the ground at depth ``z_m``."""
        return self.horizon_row + self.focal_px * (self.camera_height_m - np.asarray(y_m, dtype=np.float64)) / z_m

    def depth_of_row(self, row: np.ndarray | float) -> np.ndarray:
        """Depth of the ground seen at continuous image ``row`` (below the horizon only)."""
        return self.focal_px * self.camera_height_m / (np.asarray(row, dtype=np.float64) - self.horizon_row)

    def to_dict(self) -> dict[str, float]:
        """The camera as stored in an image entry's ``render_truth``."""
        return {
            "camera_height_m": self.camera_height_m,
            "focal_px": self.focal_px,
            "horizon_row": self.horizon_row,
        }
