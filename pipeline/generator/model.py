"""The class-conditional inpainting denoiser: its architecture, label table and noise schedules.

Input channels: noisy window (3) + masked window (3, zero inside the mask) + mask (1), and for an
exemplar-conditioned model (the default) exemplar composite (3) + exemplar alpha (1), see :mod:`.exemplar`.
Output: the v-prediction (3). One class embedding per label, plus a null label for classifier-free guidance.
"""

from __future__ import annotations

from collections.abc import Sequence
from dataclasses import asdict, dataclass

import torch
from diffusers import DDPMScheduler, DPMSolverMultistepScheduler, UNet2DModel
from diffusers.utils import is_accelerate_available

from .exemplar import EXEMPLAR_IN_CHANNELS, PLAIN_IN_CHANNELS
from .request import BACKGROUND

FORMAT = "rarefill-inpaint"
FORMAT_VERSION = 1
METADATA = "rarefill_model.json"
"""Metadata file of a folder written by ``fit``; written last, so its presence marks the folder complete."""

MODEL_INDEX = "model_index.json"
"""Index file of a diffusers pipeline folder (a user's own inpainting model)."""

NULL_LABEL = 0
"""Class-embedding index of the dropped condition (classifier-free guidance)."""


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
    exemplar: bool = True
    """Exemplar channels (11 inputs) or the plain class-conditional inpainter (7 inputs)."""

    @property
    def in_channels(self) -> int:
        return EXEMPLAR_IN_CHANNELS if self.exemplar else PLAIN_IN_CHANNELS

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


def native_bf16() -> bool:
    """Whether this CPU computes bfloat16 natively (AVX-512 BF16 or AMX), so bf16 autocast is faster.

    Without it, torch runs bf16 convolutions on a slow reference path (measured 20x or more slower than
    float32 on an AVX2 machine), so rarefill uses bf16 autocast only where it pays.
    """
    return bool(torch.ops.mkldnn._is_mkldnn_bf16_supported())


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
        in_channels=config.in_channels,
        out_channels=3,
        block_out_channels=tuple(config.block_out_channels),
        layers_per_block=config.layers_per_block,
        down_block_types=down,
        up_block_types=up,
        norm_num_groups=config.norm_num_groups,
        attention_head_dim=config.block_out_channels[-1] // 2,
        num_class_embeds=n_labels,
    )


def same_architecture(config: DenoiserConfig, unet: UNet2DModel) -> list[str]:
    """The fields (other than the input channels) in which ``unet`` differs from ``config``; empty if none."""
    ours = build_unet(config, int(unet.config.num_class_embeds)).config
    keys = ("sample_size", "block_out_channels", "layers_per_block", "down_block_types", "up_block_types")
    keys += ("norm_num_groups", "attention_head_dim", "out_channels")
    return [k for k in keys if tuple(_listify(ours[k])) != tuple(_listify(unet.config[k]))]


def _listify(value):
    return value if isinstance(value, (list, tuple)) else [value]


@torch.no_grad()
def widen_from(unet: UNet2DModel, source: UNet2DModel) -> None:
    """Copy ``source``'s weights into ``unet`` in place (a warm start); input channels ``unet`` has beyond
    ``source``'s get zero weights, so at first the new inputs change nothing and the model draws what the
    source drew.

    Raises
    ------
    ValueError
        The two differ in anything but the number of input channels, or ``source`` has more of them.
    """
    state = source.state_dict()
    own = unet.state_dict()
    if set(state) != set(own):
        raise ValueError("the source model has other layers")
    weight = state["conv_in.weight"]
    if weight.shape[1] > own["conv_in.weight"].shape[1]:
        raise ValueError(
            f"the source model has {weight.shape[1]} input channels, more than {own['conv_in.weight'].shape[1]}"
        )
    wide = torch.zeros_like(own["conv_in.weight"])
    wide[:, : weight.shape[1]] = weight
    state = {**state, "conv_in.weight": wide}
    for key, value in state.items():
        if value.shape != own[key].shape:
            raise ValueError(f"{key}: shape {tuple(value.shape)} != {tuple(own[key].shape)}")
    unet.load_state_dict(state)


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
