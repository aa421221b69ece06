"""Turn CenterNet outputs into boxes: peaks of the class heatmaps (3x3 max-pool, no NMS), top-k.

References
----------
Zhou, Wang, Kraehenbuehl, "Objects as Points", arXiv:1904.07850, 2019, Sec. 4: a peak is a cell
whose value is at least that of its 8 neighbours, found by a 3x3 max-pooling; the top 100 peaks
are kept; no non-maximum suppression.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import torch
import torch.nn.functional as F


@dataclass(frozen=True)
class Detections:
    """Detections of one image.

    Attributes
    ----------
    boxes : (N, 4) float32 ndarray
        COCO boxes ``(x, y, w, h)`` in input pixels.
    scores : (N,) float32 ndarray
        Heatmap peak values in (0, 1), descending.
    labels : (N,) int64 ndarray
        Class index of each box.
    """

    boxes: np.ndarray
    scores: np.ndarray
    labels: np.ndarray


def extract_peaks(heatmap: torch.Tensor, *, k: int) -> tuple[torch.Tensor, torch.Tensor, torch.Tensor, torch.Tensor]:
    """The ``k`` highest local maxima of each image's class heatmaps.

    Parameters
    ----------
    heatmap : (B, C, h, w) float tensor
        Class probabilities (after the sigmoid).
    k : int
        Peaks per image (over all classes); at most ``C h w``.

    Returns
    -------
    scores, classes, rows, cols : (B, k) tensors
        Peak value (float) and its class, row and column (int64), highest first. Cells that are not
        local maxima score 0, so they come last when an image has fewer than ``k`` peaks.
    """
    if heatmap.ndim != 4:
        raise ValueError(f"heatmap must be (B, C, h, w), got shape {tuple(heatmap.shape)}")
    batch, _, height, width = heatmap.shape
    if not 1 <= k <= heatmap[0].numel():
        raise ValueError(f"k must be in [1, {heatmap[0].numel()}], got {k}")
    pooled = F.max_pool2d(heatmap, kernel_size=3, stride=1, padding=1)
    peaks = heatmap * (pooled == heatmap)
    scores, flat = peaks.reshape(batch, -1).topk(k)
    classes = flat // (height * width)
    cells = flat % (height * width)
    return scores, classes, cells // width, cells % width


def decode(
    heatmap: torch.Tensor,
    size: torch.Tensor,
    offset: torch.Tensor,
    *,
    stride: int,
    k: int = 100,
    min_score: float = 0.01,
) -> list[Detections]:
    """Boxes from the three heads.

    Parameters
    ----------
    heatmap : (B, C, h, w) float tensor
        Class probabilities.
    size : (B, 2, h, w) float tensor
        ``(w, h)`` of the object centred in each cell, in output cells.
    offset : (B, 2, h, w) float tensor
        ``(x, y)`` sub-cell position of that centre.
    stride : int
        Input pixels per output cell.
    k : int
        Most detections per image (the paper keeps 100).
    min_score : float
        Drop peaks below this value (they cannot change AP noticeably and cost evaluation time).

    Returns
    -------
    list of Detections
        One per image.
    """
    scores, classes, rows, cols = extract_peaks(heatmap, k=k)
    out = []
    for b in range(heatmap.shape[0]):
        keep = scores[b] >= min_score
        r, c = rows[b][keep], cols[b][keep]
        cx = (c.float() + offset[b, 0, r, c]) * stride
        cy = (r.float() + offset[b, 1, r, c]) * stride
        w = size[b, 0, r, c].clamp(min=0) * stride
        h = size[b, 1, r, c].clamp(min=0) * stride
        boxes = torch.stack([cx - w / 2, cy - h / 2, w, h], dim=1)
        out.append(
            Detections(
                boxes.detach().numpy().astype(np.float32),
                scores[b][keep].detach().numpy().astype(np.float32),
                classes[b][keep].detach().numpy().astype(np.int64),
            )
        )
    return out
