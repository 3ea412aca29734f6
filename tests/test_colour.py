"""sRGB transfer function against IEC 61966-2-1."""

import numpy as np

from featuretex.scene.colour import linear_to_srgb, linear_to_srgb_torch, srgb_to_linear, to_uint8


def iec_decode(v):
    # IEC 61966-2-1:1999 section 5.2, written out independently of the module under test
    return np.where(v <= 0.04045, v / 12.92, ((v + 0.055) / 1.055) ** 2.4)


def test_decode_matches_iec_formula():
    v = np.linspace(0, 1, 1001)
    assert np.allclose(srgb_to_linear(v), iec_decode(v), atol=2e-7)


def test_published_check_values():
    # Check values of the IEC 61966-2-1 transfer function, ((c + 0.055) / 1.055)^2.4 above 0.04045, c / 12.92 below:
    # 8-bit code 128 -> linear 0.2158605; code 188 -> 0.5028865; code 10 -> 0.0030353 (linear segment)
    codes = np.array([10, 128, 188, 255]) / 255.0
    expect = np.array([0.0030353, 0.2158605, 0.5028865, 1.0])
    assert np.allclose(srgb_to_linear(codes), expect, atol=2e-6)
    # the two segments meet at linear 0.0031308 <-> encoded 0.04045 (IEC 61966-2-1 breakpoints)
    assert abs(float(linear_to_srgb(np.float32(0.0031308))) - 0.04045) < 1e-4


def test_round_trip_8bit_codes_are_exact():
    codes = np.arange(256) / 255.0
    assert np.array_equal(to_uint8(linear_to_srgb(srgb_to_linear(codes))), np.arange(256))


def test_torch_encoder_matches_numpy():
    import torch

    x = np.linspace(0, 1, 513, dtype=np.float32)
    assert np.allclose(linear_to_srgb_torch(torch.from_numpy(x)).numpy(), linear_to_srgb(x), atol=1e-6)
