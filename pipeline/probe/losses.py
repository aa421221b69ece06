"""CenterNet's training loss: penalty-reduced focal loss on the heatmaps, L1 on size and offset.

References
----------
Zhou, Wang, Kraehenbuehl, "Objects as Points", arXiv:1904.07850, 2019, Eq. (1)-(3): alpha = 2,
beta = 4, lambda_size = 0.1, lambda_off = 1; each term normalised by the number of objects.
"""

from __future__ import annotations

import torch

ALPHA = 2.0
BETA = 4.0
SIZE_WEIGHT = 0.1
OFFSET_WEIGHT = 1.0
_EPS = 1e-4


def focal_loss(logits: torch.Tensor, target: torch.Tensor) -> torch.Tensor:
    """Penalty-reduced pixel-wise focal loss (the paper's Eq. 1).

    ``-1/N sum (1 - p)^alpha log p`` at peaks (target 1) and ``-1/N sum (1 - y)^beta p^alpha log(1 - p)``
    elsewhere, with ``N`` the number of peaks (at least 1).

    Parameters
    ----------
    logits : (B, C, h, w) float tensor
    target : (B, C, h, w) float tensor
        Gaussian heatmaps with value exactly 1 at object centres.

    Returns
    -------
    scalar tensor
    """
    p = torch.sigmoid(logits).clamp(_EPS, 1 - _EPS)
    peak = target.eq(1).float()
    positive = (1 - p).pow(ALPHA) * torch.log(p) * peak
    negative = (1 - target).pow(BETA) * p.pow(ALPHA) * torch.log(1 - p) * (1 - peak)
    return -(positive.sum() + negative.sum()) / peak.sum().clamp(min=1)


def gathered_l1(
    prediction: torch.Tensor, target: torch.Tensor, index: torch.Tensor, mask: torch.Tensor
) -> torch.Tensor:
    """Mean absolute error at object centres only (the paper's Eq. 2 and 3).

    Parameters
    ----------
    prediction : (B, 2, h, w) float tensor
    target : (B, K, 2) float tensor
    index : (B, K) int64 tensor
        Flat cell index of each object's centre.
    mask : (B, K) bool tensor
        Which slots hold an object.

    Returns
    -------
    scalar tensor
        Summed over objects and both components, divided by the number of objects (at least 1).
    """
    batch, channels = prediction.shape[:2]
    flat = prediction.reshape(batch, channels, -1).permute(0, 2, 1)
    picked = flat.gather(1, index.unsqueeze(-1).expand(-1, -1, channels))
    weight = mask.unsqueeze(-1).float()
    return ((picked - target).abs() * weight).sum() / weight.sum().clamp(min=1)


def centernet_loss(outputs: dict[str, torch.Tensor], batch: dict[str, torch.Tensor]) -> dict[str, torch.Tensor]:
    """The weighted sum of the three terms, and each term (keys ``total``, ``heatmap``, ``size``, ``offset``)."""
    parts = {
        "heatmap": focal_loss(outputs["heatmap"], batch["heatmap"]),
        "size": gathered_l1(outputs["size"], batch["size"], batch["index"], batch["mask"]),
        "offset": gathered_l1(outputs["offset"], batch["offset"], batch["index"], batch["mask"]),
    }
    parts["total"] = parts["heatmap"] + SIZE_WEIGHT * parts["size"] + OFFSET_WEIGHT * parts["offset"]
    return parts
