"""rarefill: synthetic-data augmentation for rare-object detection data sets."""

__version__ = "0.1.0"
