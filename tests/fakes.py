"""Small stand-ins for the generator and verifier: deterministic, fast, and honest about what they draw.

The fake generator paints a solid block (a colour drawn from the request's seed) inside each request's
mask, leaving a margin like the insert stage's, and leaves every pixel outside the mask untouched.
"""

from __future__ import annotations

from collections.abc import Sequence

import numpy as np

from pipeline.generator import InpaintRequest


class BlockGenerator:
    """Generator protocol: ``classes``, ``inpaint``, ``info``."""

    def __init__(self, classes: Sequence[str] = ("car", "van", "bus", "tractor", "works_trailer"), *, inset=0.1):
        self.classes = tuple(classes)
        self.accepts_exemplar = False
        self.inset = inset
        self.calls: list[int] = []

    def inpaint(self, requests: Sequence[InpaintRequest], *, steps: int, guidance: float) -> list[np.ndarray]:
        self.calls.append(len(requests))
        frames = []
        for request in requests:
            frame = request.image.copy()
            x, y, w, h = request.box
            rng = np.random.default_rng(request.seed)
            colour = rng.integers(0, 256, size=3).astype(np.uint8)
            colour[rng.integers(3)] = 255 - int(request.image[int(y), int(x)].mean()) // 4  # stand out
            r0, r1 = int(round(y + self.inset * h)), int(round(y + h - 2))
            c0, c1 = int(round(x + self.inset * w)), int(round(x + w - self.inset * w))
            block = np.zeros_like(request.mask)
            block[r0:r1, c0:c1] = True
            frame[block & request.mask] = colour
            frames.append(frame)
        return frames

    def info(self) -> dict:
        return {"kind": "test-block", "classes": list(self.classes)}


class AlwaysVerifier:
    """Sees the wanted class with a fixed probability."""

    def __init__(self, probability: float = 0.9) -> None:
        self.probability = probability

    def present_probability(self, image, box, label) -> float:
        return self.probability


def fake_context(dataset, ground, *, verifier=None, surfaces=None):
    """A StageContext over ``dataset`` with the block generator and every scene's surface read once."""
    from pipeline.filters import FilterLimits
    from pipeline.stages.base import StageContext
    from pipeline.surface import mask_for

    if surfaces is None:
        surfaces = {s.id: mask_for(s, dataset=dataset) for s in dataset.scenes}
    return StageContext(
        dataset=dataset,
        generator=BlockGenerator(),
        ground=ground,
        limits=FilterLimits(),
        surface=lambda scene: surfaces[scene.id],
        aspect_ratios={},
        footprint_rows=(0.0, 1e9),
        verifier=verifier,
    )


class BoxVerifier:
    """A verifier for every stage: sees backgrounds as background, and the wanted class with a probability
    that depends on the box only (``low`` or ``high``, by the parity of the box's rounded left edge), so a run
    both accepts and rejects candidates, deterministically."""

    def __init__(self, classes: Sequence[str] = ("background", "car", "van", "bus", "tractor", "works_trailer")):
        self.classes = tuple(classes)
        self.low, self.high = 0.2, 0.9

    def probabilities(self, image, boxes) -> np.ndarray:
        out = np.zeros((len(boxes), len(self.classes)), np.float32)
        out[:, 0] = 1.0
        return out

    def present_probability(self, image, box, label) -> float:
        return self.high if int(round(box[0])) % 2 == 0 else self.low


class ShadeGenerator:
    """A generator that takes exemplars: it returns the placed exemplar with its repainted region shaded
    (every pixel of the mask times ``gain``, plus a smooth left-to-right ramp), as a harmonising model
    changes light and colour but not detail. Pixels outside the mask come back unchanged."""

    accepts_exemplar = True

    def __init__(self, classes: Sequence[str] = ("car", "van", "bus", "tractor", "works_trailer"), *, gain=0.8):
        self.classes = tuple(classes)
        self.gain = gain
        self.calls: list[int] = []

    def inpaint(self, requests: Sequence[InpaintRequest], *, steps: int, guidance: float) -> list[np.ndarray]:
        from pipeline.generator.request import check_request

        self.calls.append(len(requests))
        frames = []
        for i, request in enumerate(requests):
            check_request(request, i, self.classes, accepts_exemplar=True)
            frame = request.image.copy()
            ramp = np.linspace(-12.0, 12.0, frame.shape[1], dtype=np.float32)[None, :, None]
            shaded = np.clip(request.exemplar.astype(np.float32) * self.gain + ramp, 0, 255).round().astype(np.uint8)
            frame[request.mask] = shaded[request.mask]
            frames.append(frame)
        return frames

    def info(self) -> dict:
        return {"kind": "test-shade", "classes": list(self.classes), "window": 64}
