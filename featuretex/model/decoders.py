"""Decoders (plugins of kind "decoders"): how sampled features become a linear-light colour.

Every decoder has the same per-texel head: a *linear* map (3 x 3 matrix + bias) of the texture's
colour layer. Texture filtering (bilinear, trilinear) is linear too, so applying the head to
filtered texels in screen space gives exactly the same colour as filtering the head's RGB
texture: the head is bakeable exactly, at every level of detail. (A non-linear head would not
commute with the filter.)

"texel-screen" adds a small convolutional network in screen space that sees the sampled latent
features, the head's colour, and the view direction and normal (in camera and in world axes:
lights may be fixed to either), and outputs a bounded residual for what one colour per texel cannot hold (shine that moves with the view,
sub-pixel misregistration). Its last layer starts at zero, so the first render is the head's.
"""

from __future__ import annotations

import torch
from torch import nn

from featuretex.errors import InputError

GEO_CHANNELS = 12  # view direction (3) + normal (3) in camera axes, then the same in world axes
PRECISIONS = ("auto", "float32", "bfloat16")


def bfloat16_in_hardware() -> bool:
    """Whether this CPU multiplies bfloat16 matrices in hardware (AMX tiles), where oneDNN runs
    bfloat16 convolutions several times faster than float32 ones (elsewhere they are emulated)."""
    try:
        return bool(torch.cpu._is_amx_tile_supported())
    except (AttributeError, RuntimeError):   # a private probe: absent from some torch builds
        return False


def resolve_precision(name: str) -> str:
    """fit.precision -> the screen decoder's convolution precision, "float32" or "bfloat16".

    "auto" takes bfloat16 where the hardware has it (AMX): the decoder's convolutions run faster
    with held-out figures within noise (benchmarks/fit.py measures both side by side). Weights, gradients, the texture and the loss stay float32 (autocast)."""
    if name not in PRECISIONS:
        raise InputError(f"config: fit.precision must be one of {', '.join(PRECISIONS)}; got {name!r}")
    if name == "auto":
        return "bfloat16" if bfloat16_in_hardware() else "float32"
    return name


class TexelHead(nn.Module):
    """colour = W c + b per texel of the colour layer c; starts as the identity."""

    def __init__(self) -> None:
        super().__init__()
        self.weight = nn.Parameter(torch.eye(3))          # (3, 3)
        self.bias = nn.Parameter(torch.zeros(3))          # (3,) linear light

    def forward(self, feat: torch.Tensor) -> torch.Tensor:
        """(..., 3) colour-layer texels -> (..., 3) linear colour."""
        return feat @ self.weight.t() + self.bias

    def flops_per_sample(self) -> int:
        return 2 * self.weight.numel()


class ScreenDecoder(nn.Module):
    """3x3 conv stack -> bound * tanh: a residual in linear light, |residual| < bound."""

    def __init__(self, in_channels: int, hidden: int, layers: int, bound: float):
        super().__init__()
        mods: list[nn.Module] = []
        c = in_channels
        for _ in range(layers):
            mods += [nn.Conv2d(c, hidden, 3, padding=1), nn.ReLU(inplace=True)]
            c = hidden
        self.body = nn.Sequential(*mods)
        self.out = nn.Conv2d(c, 3, 1)
        nn.init.zeros_(self.out.weight)
        nn.init.zeros_(self.out.bias)
        self.bound = float(bound)
        self.halo = layers                                # pixels of context each side
        self.bfloat16 = False                             # convolutions in bfloat16 (set by the model)

    def forward(self, x: torch.Tensor) -> torch.Tensor:
        """(B, in, h, w) -> (B, 3, h, w) float32, computed on channels-last memory: torch's CPU
        convolutions are faster in that layout. The fit's inputs already come in that layout, so this is a no-op on its hot path."""
        x = x.contiguous(memory_format=torch.channels_last)
        with torch.autocast("cpu", dtype=torch.bfloat16, enabled=self.bfloat16):
            y = self.out(self.body(x))
        return self.bound * torch.tanh(y.float())

    def flops_per_pixel(self) -> int:
        """Multiply-adds x 2 of every convolution (activations and tanh not counted)."""
        return sum(2 * m.weight.numel() for m in self.modules() if isinstance(m, nn.Conv2d))


class TexelDecoder(nn.Module):
    """The bakeable per-texel head alone: render == sampling the baked RGB texture.

    The interface a decoder plugin offers the model (subclass this to get the defaults): `head`,
    `screen` (a ScreenDecoder or None), `halo`, `residual(feat, colour, geo)`, and
    `residual_packed(img, channels, geo)`, which the fit calls with latent features and colour in
    one image (override it to skip the split when your network takes them together)."""

    name = "texel"

    def __init__(self, channels: int, *, hidden: int = 24, layers: int = 2, bound: float = 0.25):
        super().__init__()
        self.head = TexelHead()
        self.screen: ScreenDecoder | None = None

    @property
    def halo(self) -> int:
        return 0 if self.screen is None else self.screen.halo

    def residual(self, feat: torch.Tensor, colour: torch.Tensor, geo: torch.Tensor) -> torch.Tensor | None:
        """(B, 3, h, w) screen-space residual from latent features feat (B, C, h, w), colour
        (B, 3, h, w) linear and geo (B, GEO_CHANNELS, h, w); None when the decoder has no screen-space part."""
        return None

    def residual_packed(self, img: torch.Tensor, channels: int, geo: torch.Tensor) -> torch.Tensor | None:
        """residual() of img (B, channels + 3, h, w) = the latent features, then the colour."""
        return self.residual(img[:, :channels], img[:, channels:], geo)

    def flops_per_pixel(self) -> dict[str, int]:
        out = {"head": self.head.flops_per_sample()}
        if self.screen is not None:
            out["screen"] = self.screen.flops_per_pixel()
        return out


class TexelScreenDecoder(TexelDecoder):
    """Head plus the screen-space residual network (the default)."""

    name = "texel-screen"

    def __init__(self, channels: int, *, hidden: int = 24, layers: int = 2, bound: float = 0.25):
        super().__init__(channels, hidden=hidden, layers=layers, bound=bound)
        self.screen = ScreenDecoder(channels + 3 + GEO_CHANNELS, hidden, layers, bound)

    def residual(self, feat: torch.Tensor, colour: torch.Tensor, geo: torch.Tensor) -> torch.Tensor | None:
        assert self.screen is not None
        return self.screen(torch.cat([feat, colour, geo], dim=1))

    def residual_packed(self, img: torch.Tensor, channels: int, geo: torch.Tensor) -> torch.Tensor | None:
        assert self.screen is not None
        return self.screen(torch.cat([img, geo], dim=1))   # the same input as residual(), one concatenation


def parameter_count(module: nn.Module) -> int:
    return sum(p.numel() for p in module.parameters())
