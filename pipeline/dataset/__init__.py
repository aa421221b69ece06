"""Load, validate and save COCO detection data sets.

Conventions, stated once for the whole package:

* A COCO box is ``[x, y, w, h]`` in pixels: ``(x, y)`` is the top-left corner, ``x`` counts columns
  from the left edge and ``y`` rows from the top edge (cocodataset.org, "Data format").
* Arrays are indexed ``(row, col)``; images are ``(H, W, 3) uint8`` RGB.
* Keys that COCO does not define (provenance lives there) are kept in ``extra`` and written back
  unchanged, so a load/save round trip loses nothing.

Pixel rule: every image loads as 8-bit RGB. EXIF orientation is applied first (the JSON's width and
height must describe the upright image). Palette (P), greyscale (L) and CMYK images are converted by
Pillow's colour conversion; alpha channels (LA, RGBA, PA) are dropped, not composited; 16- and 32-bit
greyscale (I;16, I) are scaled to 8 bits by keeping the high byte of the 16-bit range.

One module per job:

``records``
    The frozen records: :class:`Dataset`, :class:`Scene`, :class:`Annotation`, :class:`Category`.
``pixels``
    An image's pixels by the pixel rule, and its upright size from the header alone.
``loading``
    Reading and validating a COCO file: :func:`load_dataset`, :func:`parse_dataset`.
``saving``
    The COCO JSON of a data set (:func:`to_coco`) and writing it atomically (:func:`save_dataset`).
"""

from .loading import BOX_TOLERANCE_PX, clip_box, default_images_dir, load_dataset, parse_dataset
from .pixels import read_rgb
from .records import Annotation, Category, Dataset, Scene
from .saving import annotation_entry, category_entry, image_entry, save_dataset, to_coco

__all__ = [
    "BOX_TOLERANCE_PX",
    "Annotation",
    "Category",
    "Dataset",
    "Scene",
    "annotation_entry",
    "category_entry",
    "clip_box",
    "default_images_dir",
    "image_entry",
    "load_dataset",
    "parse_dataset",
    "read_rgb",
    "save_dataset",
    "to_coco",
]
