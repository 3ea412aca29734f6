"""Seam visibility of a textured render: do UV island borders show as lines?

At a view, pairs of 4-neighbour pixels on one continuous piece of surface are split in two sets:
*seam pairs*, where the rendered UV jumps (the two pixels lie on two sides of a UV seam: two
islands, or the two edges of one island that wraps around), and *interior pairs*, where it moves
as smoothly as the surface (a seeded random subset). The measure is

    ratio = mean |I(p) - I(q)| over seam pairs / mean |I(p) - I(q)| over interior pairs

on sRGB-encoded values (what a viewer shows), channels averaged. A texture without seams gives
about 1 (a seam is then just another place on the surface); a step across island borders gives
more. Pairs across a silhouette or an occlusion edge are not on one surface and count in neither.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np

from featuretex.raster.gbuffer import GBuffer
from featuretex.scene.colour import linear_to_srgb
from featuretex.scene.manifest import View
from featuretex.scene.mesh import SceneMesh
from featuretex.texels.lod import uv_footprint

JUMP_FACTOR = 3.0         # |uv(p) - uv(q)| above this many pixel footprints in uv: the UV jumps
MAX_GAP_PX = 4.0          # neighbours farther apart in 3D than this many pixel footprints: not one surface
INTERIOR_SAMPLES = 20000  # random interior pairs per view


@dataclass
class SeamStats:
    seam_sum: float = 0.0       # sum of mean-over-channels |difference| over seam pairs, sRGB
    seam_pairs: int = 0
    interior_sum: float = 0.0
    interior_pairs: int = 0

    def __iadd__(self, o: "SeamStats") -> "SeamStats":
        self.seam_sum += o.seam_sum
        self.seam_pairs += o.seam_pairs
        self.interior_sum += o.interior_sum
        self.interior_pairs += o.interior_pairs
        return self

    def as_dict(self) -> dict:
        seam = self.seam_sum / self.seam_pairs if self.seam_pairs else None
        inner = self.interior_sum / self.interior_pairs if self.interior_pairs else None
        ratio = seam / inner if seam is not None and inner else None
        return {"ratio": ratio, "seam_mad": seam, "interior_mad": inner,
                "seam_pairs": self.seam_pairs, "interior_pairs": self.interior_pairs}


def neighbour_pairs(gbuf: GBuffer, mesh: SceneMesh, view: View, mask: np.ndarray
                    ) -> tuple[np.ndarray, np.ndarray]:
    """(K, 2) seam and (L, 2) interior pairs of flat pixel indices: 4-neighbours, both in `mask`
    (H, W) bool, on one continuous surface.

    Within an island a one-pixel step moves uv by at most the pixel's footprint rho (the longer
    screen-space UV derivative, computed per triangle); a step across a seam lands elsewhere in the
    layout, so a move of more than JUMP_FACTOR footprints marks a seam.
    """
    H, W = gbuf.shape
    pos = gbuf.position(mesh)                                         # (H, W, 3) scene units
    uv = gbuf.uv(mesh).astype(np.float64)                             # (H, W, 2)
    rho = uv_footprint(gbuf, mesh, view).astype(np.float64)           # (H, W) uv units per pixel
    foot = np.asarray(gbuf.depth, np.float64) / (0.5 * (view.camera.fx + view.camera.fy))  # units per px
    flat = np.arange(H * W).reshape(H, W)
    seams, inner = [], []
    for a, b in (((slice(None), slice(0, W - 1)), (slice(None), slice(1, W))),
                 ((slice(0, H - 1), slice(None)), (slice(1, H), slice(None)))):
        ok = mask[a] & mask[b]
        gap = np.linalg.norm(pos[a] - pos[b], axis=-1)
        ok &= gap <= MAX_GAP_PX * np.maximum(foot[a], foot[b])
        jump = np.linalg.norm(uv[a] - uv[b], axis=-1) > JUMP_FACTOR * np.maximum(rho[a], rho[b]) + 1e-9
        pair = np.stack([flat[a][ok], flat[b][ok]], axis=1)
        seams.append(pair[jump[ok]])
        inner.append(pair[~jump[ok]])
    return np.concatenate(seams), np.concatenate(inner)


def seam_stats(images_lin: list[np.ndarray], gbuf: GBuffer, mesh: SceneMesh, view: View, mask: np.ndarray,
               rng: np.random.Generator, interior_samples: int = INTERIOR_SAMPLES) -> list[SeamStats]:
    """Sums of one view for each image (H, W, 3) linear, over the same pairs; mask: (H, W) bool."""
    seams, inner = neighbour_pairs(gbuf, mesh, view, np.asarray(mask, bool))
    if len(inner) > interior_samples:
        inner = inner[np.sort(rng.choice(len(inner), interior_samples, replace=False))]
    out = []
    for image in images_lin:
        img = linear_to_srgb(image).reshape(-1, image.shape[-1]).astype(np.float64)

        def diff_sum(p: np.ndarray) -> float:
            return float(np.abs(img[p[:, 0]] - img[p[:, 1]]).mean(axis=1).sum()) if len(p) else 0.0

        out.append(SeamStats(diff_sum(seams), len(seams), diff_sum(inner), len(inner)))
    return out


def seam_ratio(mesh: SceneMesh, gbuffers: dict[str, GBuffer], renders: dict[str, np.ndarray],
               views: list[View], masks: dict[str, np.ndarray], seed: int = 0,
               photos: dict[str, np.ndarray] | None = None) -> dict:
    """Pooled seam measure over `views`: {"ratio", "seam_mad", "interior_mad", "seam_pairs",
    "interior_pairs"} (ratio None when no seam is in sight). renders: view -> (H, W, 3) linear.

    With photos (view -> (H, W, 3) linear), also "photo_ratio": the same measure on the photos over
    the same pairs, the level the photographed content itself shows (chart borders often follow
    creases, where real shading changes).
    """
    total, ref = SeamStats(), SeamStats()
    for k, view in enumerate(views):
        images = [renders[view.name]] + ([photos[view.name]] if photos is not None else [])
        st = seam_stats(images, gbuffers[view.name], mesh, view, masks[view.name], np.random.default_rng([seed, k]))
        total += st[0]
        if photos is not None:
            ref += st[1]
    out = total.as_dict()
    if photos is not None:
        out["photo_ratio"] = ref.as_dict()["ratio"]
    return out
