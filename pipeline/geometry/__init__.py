"""The ground-plane model: expected box height of a class at a bottom row, and ground distance.

For a roughly level pinhole camera at height ``h_cam`` over a flat ground, an object of real height
``H`` standing on the ground with its lower box edge at image row ``v_b`` (rows counted top-down) has
image height

    h = H (v_b - v_h) / h_cam = r_c (v_b - v_h),

where ``v_h`` is the horizon row and ``r_c = H / h_cam`` the class's *height ratio*. :func:`fit_ground`
recovers ``v_h`` and every class's ``r_c`` from the labelled boxes alone, so the model is in pixels and
ratios; metres enter only through the prior height table (classes with too few boxes) and through
:func:`ground_distance`, which also needs the focal length (boxes alone cannot tell it: ``h``, ``w`` and
``v_b - v_h`` all scale with ``f``).

A camera that pitches a little moves the horizon from image to image. The fit gives every image an
offset from the data set's horizon, shrunk toward zero like a random effect (its spread is estimated
from the data, so a fixed camera gets offsets near zero). Filters use an image's own horizon when they
know the image; for any other image the band widens by the horizon's spread (see
:meth:`GroundModel.expected_height`).

References
----------
.. [1] D. Hoiem, A. A. Efros, M. Hebert, "Putting Objects in Perspective", CVPR 2006; IJCV 80, 2008.
.. [2] R. Hartley, A. Zisserman, "Multiple View Geometry in Computer Vision", 2nd ed., 2004 (pinhole
   camera: ``h = f H / Z`` and ``v_b = v_h + f h_cam / Z``).
"""

from .boxes import BORDER_PX, is_usable, usable_boxes
from .cameras import CameraGroups, ClassHeight, camera_label, ground_for, scene_intrinsics
from .distances import focal_length, ground_distance, lateral_offset
from .fit import MIN_FIT_BOXES, MIN_SPREAD, PRIOR_LOG_SD, fit_cameras, fit_ground
from .model import ClassGround, GroundModel, HeightBand, Intrinsics
from .priors import HEIGHT_KEYS, PRIOR_HEIGHTS_M, box_height_m, measured_heights, normalise_class_name, prior_heights

__all__ = [
    "BORDER_PX",
    "HEIGHT_KEYS",
    "MIN_FIT_BOXES",
    "MIN_SPREAD",
    "PRIOR_HEIGHTS_M",
    "PRIOR_LOG_SD",
    "CameraGroups",
    "ClassGround",
    "ClassHeight",
    "GroundModel",
    "HeightBand",
    "Intrinsics",
    "box_height_m",
    "camera_label",
    "fit_cameras",
    "fit_ground",
    "focal_length",
    "ground_distance",
    "ground_for",
    "is_usable",
    "lateral_offset",
    "measured_heights",
    "normalise_class_name",
    "prior_heights",
    "scene_intrinsics",
    "usable_boxes",
]
