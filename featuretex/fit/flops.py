"""Size and arithmetic of the fit model: dense FLOPs per pixel of a forward pass, the FLOPs of
training steps, and the one-line description the fit logs."""

from __future__ import annotations

from featuretex.model.decoders import parameter_count
from featuretex.model.scene_model import SceneModel


def forward_flops_per_pixel(model: SceneModel) -> dict[str, int]:
    """Dense arithmetic per pixel of one forward pass (texel gathers and activations not counted)."""
    out = model.decoder.flops_per_pixel()
    out["sampling"] = 2 * 8 * model.texture.out_channels   # upper bound: 8 trilinear taps per layer
    return out


def train_flops(model: SceneModel, pixels_rendered: float, pixels_covered: float) -> float:
    """Dense arithmetic of training steps that rendered `pixels_rendered` crop pixels, of which
    `pixels_covered` show the surface: forward (screen decoder on every crop pixel, SSIM's five
    11-tap separable blurs of 3 channels, head and texel filtering on surface pixels) times 3 for
    forward + backward (common practice: a backward pass costs about twice the forward)."""
    fl = forward_flops_per_pixel(model)
    ssim = 5 * 3 * 2 * 11 * 2
    per_rendered = fl.get("screen", 0) + ssim
    per_covered = fl["head"] + fl["sampling"]
    return 3.0 * (per_rendered * pixels_rendered + per_covered * pixels_covered)


def describe(model: SceneModel) -> str:
    fl = forward_flops_per_pixel(model)
    tex = model.texture
    screen = parameter_count(model.decoder.screen) if model.decoder.screen is not None else 0
    corr = parameter_count(model.corrections) if model.corrections is not None else 0
    return (f"fit model: colour layer {tex.size}x{tex.size}x3, latent layer {tex.latent_size}x{tex.latent_size}"
            f"x{tex.channels} ({tex.colour.numel() + tex.latent.numel():,} params), "
            f"decoder '{model.decoder_name}': head {parameter_count(model.decoder.head)} + screen {screen:,} "
            f"params, corrections {corr:,} params; per-pixel forward FLOPs: sampling <= {fl['sampling']}, "
            f"head {fl['head']}, screen {fl.get('screen', 0):,} ({model.precision} convolutions)")
