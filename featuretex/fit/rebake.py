"""Register, then re-average: a closed-form reset of the colour layer part-way through the fit.

Once the alignment fields and colour corrections have settled (they converge in a few hundred
steps against even a blurry texture), the photos can be re-averaged per texel *after* warping
each one by its field and undoing its exposure. Misregistered photos then stop ghosting the
average, and the colour layer jumps to a sharp estimate that gradient descent texel by texel
would take many more steps to reach. The fit then continues from it.
"""

from __future__ import annotations

import numpy as np
import torch

from featuretex.model.scene_model import SceneModel
from featuretex.raster.gbuffer import GBuffer
from featuretex.raster.uvspace import TexelBuffer
from featuretex.scene.loaded import Scene
from featuretex.texels.average import TexelAverage
from featuretex.texels.gutter import fill_texture
from featuretex.texels.sampling import sample_image
from featuretex.texels.visibility import usable_mask, view_samples


@torch.no_grad()
def registered_average(scene: Scene, gbuffers: dict[str, GBuffer], texels: TexelBuffer, model: SceneModel,
                       erode_px: int) -> tuple[np.ndarray, np.ndarray]:
    """(T, T, 3) float32 linear weighted average of the aligned, exposure-corrected fitted photos,
    and (T, T) bool texels seen. Weights and visibility are the classical bake's (cos x footprint)."""
    corr = model.corrections
    assert corr is not None
    T = texels.size
    avg = TexelAverage(T * T)
    for j, name in enumerate(corr.names):
        view = scene.view(name)
        gbuf = gbuffers[name]
        s = view_samples(texels, view, gbuf, usable_mask(scene, view, gbuf, erode_px))
        if len(s.idx) == 0:
            continue
        px = torch.from_numpy(s.xy.astype(np.float32))[None, None]           # (1, 1, N, 2)
        d = corr.displacement(torch.tensor([j]), px)[0, 0].numpy().astype(np.float64)
        colour = sample_image(scene.photo(view), s.xy + d).astype(np.float64)  # photo(x + d(x))
        M, b = corr.colour(torch.tensor([j]))
        colour = (colour - b[0].numpy()) @ np.linalg.inv(M[0].numpy().astype(np.float64)).T
        avg.add(s.idx, colour, s.weight)
    return avg.mean().reshape(T, T, 3).astype(np.float32), avg.seen.reshape(T, T)


@torch.no_grad()
def rebake_colour_layer(scene: Scene, gbuffers: dict[str, GBuffer], texels: TexelBuffer, model: SceneModel,
                        erode_px: int, gutter: int) -> int:
    """Replace the colour layer by the registered average (through the inverse of the texel head,
    so the head's output is the average); texels no fitted view sees keep their values, and the
    `gutter` texels around the islands copy their nearest surface texel. Returns the number of
    texels replaced."""
    avg, seen = registered_average(scene, gbuffers, texels, model, erode_px)
    if not seen.any():
        return 0
    head = model.decoder.head
    W = head.weight.double().numpy()
    cur = model.texture.colour_grid().numpy()
    target = (avg.astype(np.float64) - head.bias.double().numpy()) @ np.linalg.inv(W).T
    keep = ~seen
    target[keep] = cur[keep]                                     # unseen: as they were
    filled = fill_texture(target.astype(np.float32), np.ones_like(seen), texels.valid, gutter)
    model.texture.colour.copy_(torch.from_numpy(filled.reshape(-1, 3)))
    return int(seen.sum())
