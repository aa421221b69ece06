"""The class-conditional inpainting denoiser: its architecture, label table and noise schedules.

Input channels: noisy window (3) + masked window (3, zero inside the mask) + mask (1). Output: the
v-prediction (3). One class embedding per label, plus a null label for classifier-free guidance.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import asdict, dataclass

from diffusers import DDPMScheduler, DPMSolverMultistepScheduler, UNet2DModel
from diffusers.utils import is_accelerate_available

from .request import BACKGROUND

FORMAT = "rarefill-inpaint"
FORMAT_VERSION = 1
METADATA = "rarefill_model.json"
"""Metadata file of a folder written by ``fit``; written last, so its presence marks the folder complete."""

MODEL_INDEX = "model_index.json"
"""Index file of a diffusers pipeline folder (a user's own inpainting model)."""

NULL_LABEL = 0
"""Class-embedding index of the dropped condition (classifier-free guidance)."""

IN_CHANNELS = 7


def model_loading_options() -> dict[str, bool]:
    """Keyword arguments for loading a diffusers model or pipeline here: local files, the usual path.

    diffusers asks for its low-memory loading path by default, which needs the ``accelerate`` package;
    without it diffusers falls back to the usual path anyway and logs a multi-line advice to install it
    on every load, which a user of a 4.5 MB model cannot act on. So the low-memory path is asked for only
    when it can be taken.
    """
    return {"local_files_only": True, "low_cpu_mem_usage": is_accelerate_available()}


@dataclass(frozen=True)
class DenoiserConfig:
    """Size of the denoiser. Defaults: 1.1 M parameters, about 0.7 s per training step at batch 16 on
    2 CPU cores (measured, /work/shared/PROBE.md)."""

    window: int = 64
    block_out_channels: tuple[int, ...] = (32, 64, 64)
    layers_per_block: int = 1
    norm_num_groups: int = 8

    def __post_init__(self) -> None:
        levels = len(self.block_out_channels)
        if self.window % (2 ** (levels - 1)) != 0:
            raise ValueError(f"window {self.window} must be divisible by 2**{levels - 1}")
        if any(c % self.norm_num_groups for c in self.block_out_channels):
            raise ValueError(
                f"block_out_channels {self.block_out_channels} must be multiples of {self.norm_num_groups}"
            )

    def to_dict(self) -> dict:
        return {**asdict(self), "block_out_channels": list(self.block_out_channels)}


def label_table(classes: Sequence[str]) -> tuple[str, ...]:
    """Class-embedding index -> label: ``("", "background", *classes)``; index 0 is the null label."""
    if len(set(classes)) != len(classes) or BACKGROUND in classes or "" in classes:
        raise ValueError(f"class names must be unique, non-empty and not {BACKGROUND!r}, got {tuple(classes)}")
    return ("", BACKGROUND, *classes)


def build_unet(config: DenoiserConfig, n_labels: int) -> UNet2DModel:
    """A freshly initialised denoiser (torch's default init; seed torch before calling for repeatability).

    Attention only at the lowest resolution: it is the costly part on a CPU.
    """
    levels = len(config.block_out_channels)
    down = ("DownBlock2D",) * (levels - 1) + ("AttnDownBlock2D",)
    up = ("AttnUpBlock2D",) + ("UpBlock2D",) * (levels - 1)
    return UNet2DModel(
        sample_size=config.window,
        in_channels=IN_CHANNELS,
        out_channels=3,
        block_out_channels=tuple(config.block_out_channels),
        layers_per_block=config.layers_per_block,
        down_block_types=down,
        up_block_types=up,
        norm_num_groups=config.norm_num_groups,
        attention_head_dim=config.block_out_channels[-1] // 2,
        num_class_embeds=n_labels,
    )


def training_scheduler() -> DDPMScheduler:
    """The noise schedule used in training: cosine betas, v-prediction.

    References
    ----------
    Nichol & Dhariwal, "Improved Denoising Diffusion Probabilistic Models", ICML 2021 (cosine schedule).
    Salimans & Ho, "Progressive Distillation for Fast Sampling of Diffusion Models", ICLR 2022
    (v-prediction).
    """
    return DDPMScheduler(num_train_timesteps=1000, beta_schedule="squaredcos_cap_v2", prediction_type="v_prediction")


def sampling_scheduler(train_config: dict) -> DPMSolverMultistepScheduler:
    """DPM-Solver++ (order 2) on the training schedule: good samples in 10-20 model evaluations.

    References
    ----------
    Lu et al., "DPM-Solver++: Fast Solver for Guided Sampling of Diffusion Probabilistic Models", 2022;
    Lu et al., "DPM-Solver", NeurIPS 2022 (10-20 evaluations).
    """
    return DPMSolverMultistepScheduler.from_config(
        train_config, algorithm_type="dpmsolver++", solver_order=2, final_sigmas_type="zero"
    )
