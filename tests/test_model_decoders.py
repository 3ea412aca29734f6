"""The screen decoder's precision: bfloat16 convolutions against torch's float32 ones, and the
"auto" choice against the CPU flags the Linux kernel reports."""

from pathlib import Path

import pytest
import torch

from featuretex.errors import InputError
from featuretex.model.decoders import ScreenDecoder, resolve_precision


def _decoder(bf16: bool) -> ScreenDecoder:
    torch.manual_seed(0)
    dec = ScreenDecoder(23, 24, 2, 0.25)
    torch.nn.init.normal_(dec.out.weight, std=0.2)   # a trained-looking last layer (it starts at zero)
    dec.bfloat16 = bf16
    return dec


def test_bfloat16_decoder_matches_float32_within_bfloat16_rounding():
    """Reference: the same weights run by torch's float32 convolutions. bfloat16 keeps 8 significant
    bits (unit roundoff 2^-8 = 0.0039); with float32 accumulation the residual (|r| < 0.25) must
    agree to 1 % of its range (measured 0.4 % relative). Gradients pass ReLU kinks: where rounding
    moves a pre-activation across 0 (a fraction p ~ 0.2 % of them here) that element's gradient
    switches on or off entirely, so they agree only to ~sqrt(p) ~ 5 % in norm (measured 3-6 %);
    asserted: within 10 %, i.e. the same descent direction (cosine > 0.99)."""
    x = torch.randn(2, 23, 40, 40).contiguous(memory_format=torch.channels_last)
    outs, grads = [], []
    for bf16 in (False, True):
        dec = _decoder(bf16)
        xi = x.clone().requires_grad_(True)
        y = dec(xi)
        assert y.dtype == torch.float32 and y.shape == (2, 3, 40, 40)
        (y * torch.linspace(-1, 1, 40)).sum().backward()
        outs.append(y.detach())
        grads.append((xi.grad, dec.body[0].weight.grad))
    assert outs[0].abs().max() > 0.02                       # a residual worth comparing
    assert (outs[1] - outs[0]).abs().max() < 0.01 * 0.25
    for g32, g16 in zip(*grads):
        assert (g16 - g32).norm() < 0.10 * g32.norm()
        assert torch.nn.functional.cosine_similarity(g16.flatten(), g32.flatten(), dim=0) > 0.99


def test_auto_precision_follows_the_cpu_flags():
    """bfloat16 exactly where /proc/cpuinfo lists AMX tiles (amx_tile), else float32."""
    info = Path("/proc/cpuinfo")
    if not info.is_file():
        pytest.skip("no /proc/cpuinfo on this system")
    flags = next((ln.split(":", 1)[1].split() for ln in info.read_text().splitlines() if ln.startswith("flags")), [])
    assert resolve_precision("auto") == ("bfloat16" if "amx_tile" in flags else "float32")
    assert resolve_precision("float32") == "float32" and resolve_precision("bfloat16") == "bfloat16"
    with pytest.raises(InputError, match="fit.precision"):
        resolve_precision("half")
