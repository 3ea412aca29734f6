"""Settings of the learned fit (`fit.*`), with defaults tuned for the demo budget (~2 minutes on 2
cores) and, beside each, what it allows (featuretex/settings.py checks them before any stage runs)."""

from __future__ import annotations

from dataclasses import dataclass

from featuretex.settings import check_settings, setting
from featuretex.texels.config import texture_size

MIN_CROP = 16   # px: the SSIM window is 11 wide and the screen decoder pads each side


@dataclass
class FitConfig:
    # schedule
    steps: int = setting(600, ge=0)            # optimisation steps (the cap; a plateau may stop earlier)
    warmup: int = setting(20, ge=0)            # steps of linear learning-rate warm-up
    final_lr_frac: float = setting(0.1, ge=0, le=1)  # cosine decay down to this fraction of each learning rate
    lr: float = setting(5e-3, ge=0)            # feature texture (linear-light units per step)
    lr_latent: float = setting(1e-2, ge=0)     # latent feature layer
    lr_decoder: float = setting(2e-3, ge=0)    # head and screen-space decoder
    lr_colour: float = setting(2e-3, ge=0)     # per-view colour affine
    lr_align: float = setting(0.05, ge=0)      # per-view alignment fields (pixels per step)
    rebake_at: int = setting(500, ge=0)        # re-average the colour layer from the registered photos after this step (0 = never; scale with steps)
    gutter: int = setting(8, ge=0, le=256)     # texels of gutter padding of the re-averaged colour layer; the pipeline sets it from texture.gutter
    # model
    channels: int = setting(8, ge=1, le=64)    # latent feature channels (read by the screen-space decoder)
    latent_scale: int = setting(4, ge=1, le=64)  # latent layer has texture_size / latent_scale texels per side
    mip: bool = True                           # trilinear mip filtering by pixel footprint (False = bilinear)
    texture_size: int = texture_size(0, "the baseline's size")  # colour-layer texels per side (0: from the photo footprint)
    decoder: str = setting("texel-screen", plugin="decoders")  # decoder plugin name ("texel" = bakeable head only)
    hidden: int = setting(24, ge=1, le=1024)   # screen-space decoder width
    layers: int = setting(2, ge=1, le=32)      # 3x3 conv layers of the screen-space decoder
    residual_bound: float = setting(0.25, gt=0)  # |screen-space residual| < this, linear light
    # screen decoder convolutions: float32, bfloat16, auto (bfloat16 where the CPU has it in hardware)
    precision: str = setting("auto", choices=("auto", "float32", "bfloat16"))
    align_cell_px: float = setting(40.0, ge=1)  # alignment grid spacing, pixels (480 x 640 -> 13 x 17 nodes)
    # sampling
    crop: int = setting(128, ge=MIN_CROP, le=4096)  # square crop edge, pixels (>= 16: the SSIM window is 11)
    batch: int = setting(4, ge=1, le=4096)     # crops per step (from different views)
    edge_erode_px: int = setting(2, ge=0, le=256)  # loss mask = coverage ∩ photo mask eroded by this
    # loss and regularisation
    w_l1: float = setting(0.8, ge=0)           # L1 on sRGB-encoded values
    w_ssim: float = setting(0.2, ge=0)         # 1 - SSIM (Gaussian window, sigma 1.5)
    w_colour: float = setting(1e-2, ge=0)      # colour affine towards the identity
    w_align_mag: float = setting(1e-4, ge=0)   # alignment magnitude, per squared pixel
    w_align_smooth: float = setting(1e-2, ge=0)  # alignment roughness between grid nodes, per squared pixel
    # loop
    eval_every: int = setting(100, ge=1)       # held-out PSNR / SSIM every N steps
    checkpoint_every: int = setting(100, ge=1)  # checkpoint every N steps (and on interruption)
    plateau: int = setting(0, ge=0)            # stop after this many evals without training-loss gain (0 = never)
    plateau_tol: float = setting(1e-3, ge=0, lt=1)  # relative loss gain that counts as progress
    geometry_cache_gb: float = setting(1.0, ge=0)  # memory for precomputed crop geometry (61 B per object-box pixel; faster steps, same result)
    threads: int = setting(0, ge=0, le=4096)   # threads of every pool; 0 = this run's share of the cores (fixed per run for determinism)
    reference_view: str = ""                   # view held at identity colour; "" = first fitted view


def check_fit_config(cfg: FitConfig) -> None:
    """One clear message for knob values the fit cannot run with (for callers of the fit itself;
    the command line checks every setting before any stage)."""
    check_settings(cfg, "fit.")
