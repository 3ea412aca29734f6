"""Every knob of the learned fit, with defaults tuned for the demo budget (~2 minutes on 2 cores).

The lead mounts this dataclass as the Hydra group `fit` (`fit.steps=N`, `fit.decoder=texel`...).
"""

from __future__ import annotations

from dataclasses import dataclass

from featuretex.errors import InputError

MIN_CROP = 16   # px: the SSIM window is 11 wide and the screen decoder pads each side


@dataclass
class FitConfig:
    # schedule
    steps: int = 600                 # optimisation steps (the cap; a plateau may stop earlier)
    warmup: int = 20                 # steps of linear learning-rate warm-up
    final_lr_frac: float = 0.1       # cosine decay down to this fraction of each learning rate
    lr: float = 5e-3                 # feature texture (linear-light units per step)
    lr_latent: float = 1e-2          # latent feature layer
    lr_decoder: float = 2e-3         # head and screen-space decoder
    lr_colour: float = 2e-3          # per-view colour affine
    lr_align: float = 0.05           # per-view alignment fields (pixels per step)
    rebake_at: int = 500             # re-average the colour layer from the registered photos after this step (0 = never; scale with steps)
    # model
    channels: int = 8                # latent feature channels (read by the screen-space decoder)
    latent_scale: int = 4            # latent layer has texture_size / latent_scale texels per side
    mip: bool = True                 # trilinear mip filtering by pixel footprint (False = bilinear)
    texture_size: int = 0            # colour-layer texels per side; 0 = the baseline's size (photo footprint)
    decoder: str = "texel-screen"    # decoder plugin name ("texel" = bakeable head only)
    hidden: int = 24                 # screen-space decoder width
    layers: int = 2                  # 3x3 conv layers of the screen-space decoder
    residual_bound: float = 0.25     # |screen-space residual| < this, linear light
    precision: str = "auto"          # screen decoder convolutions: float32, bfloat16, auto (bfloat16 where the CPU has it in hardware)
    align_cell_px: float = 40.0      # alignment grid spacing, pixels (480 x 640 -> 13 x 17 nodes)
    # sampling
    crop: int = 128                  # square crop edge, pixels
    batch: int = 4                   # crops per step (from different views)
    edge_erode_px: int = 2           # loss mask = coverage ∩ photo mask eroded by this
    # loss and regularisation
    w_l1: float = 0.8                # L1 on sRGB-encoded values
    w_ssim: float = 0.2              # 1 - SSIM (Gaussian window, sigma 1.5)
    w_colour: float = 1e-2           # colour affine towards the identity
    w_align_mag: float = 1e-4        # alignment magnitude, per squared pixel
    w_align_smooth: float = 1e-2     # alignment roughness between grid nodes, per squared pixel
    # loop
    eval_every: int = 100            # held-out PSNR / SSIM every N steps
    checkpoint_every: int = 100      # checkpoint every N steps (and on interruption)
    plateau: int = 0                 # stop after this many evals without training-loss gain (0 = never)
    plateau_tol: float = 1e-3        # relative loss gain that counts as progress
    geometry_cache_gb: float = 1.0   # memory for precomputed crop geometry (61 B per object-box pixel; faster steps, same result)
    threads: int = 0                 # torch threads; 0 = all cores (fixed per run for determinism)
    reference_view: str = ""         # view held at identity colour; "" = first fitted view


def check_fit_config(cfg: FitConfig) -> None:
    """One clear message for knob values the fit cannot run with."""
    from featuretex.model.decoders import resolve_precision   # here: this module stays torch-free

    resolve_precision(cfg.precision)
    if cfg.crop < MIN_CROP:
        raise InputError(f"config: fit.crop must be at least {MIN_CROP} pixels (the SSIM window is 11); got {cfg.crop}")
    if cfg.batch < 1 or cfg.steps < 0:
        raise InputError(f"config: fit.batch must be >= 1 and fit.steps >= 0; got {cfg.batch} and {cfg.steps}")
