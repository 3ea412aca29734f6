"""From the diagnosis's working-grid fields to the offset solve's evidence and pinned vertices.

Only surface near geometry-limited regions may move: the geometry-limited texels grown by a margin
(and, in later rounds, the surface earlier rounds moved), minus what fewer than `min_views` photos
saw and minus cavities. Inside that, a texel with a
measured displacement (the diagnosis's combined sweep / alignment / silhouette offset) says "the
surface is d along the normal here"; a fine texel of the margin says "it is where it is" (0, with
`fine_weight`); geometry-limited texels without a measured offset say nothing (the smoothness
fills them in). Every vertex outside is pinned, so the rest of the scan stays exactly as it was.
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import ndimage

from featuretex.diagnose import classify as C
from featuretex.raster.uvspace import TexelBuffer
from featuretex.scene.mesh import SceneMesh
from featuretex.touchup.solve import Evidence

GRID_FIELDS = ("cls", "coverage", "displacement", "hidden", "valid", "loo_se", "loo_px")   # what the touch-up reads of a diagnosis


@dataclass
class Setup:
    evidence: Evidence      # observations on the welded mesh's faces (same face order as the mesh)
    pinned: np.ndarray      # (Vw,) bool welded vertices held still
    movable: np.ndarray     # (D, D) bool texels that may move


def grid_fields(work: dict[str, np.ndarray]) -> dict[str, np.ndarray]:
    """The working-grid fields of a diagnosis the touch-up needs (saved beside the diagnosis)."""
    return {k: np.asarray(work[k]) for k in GRID_FIELDS}


def movable_texels(fields: dict[str, np.ndarray], margin_texels: int, min_views: int) -> np.ndarray:
    """(D, D) bool: geometry-limited texels grown by `margin_texels`, seen by >= min_views views,
    not in a cavity."""
    cls = fields["cls"]
    geo = cls == C.GEOMETRY
    if not geo.any():
        return geo
    grown = ndimage.binary_dilation(geo, structure=np.ones((3, 3), bool), iterations=max(margin_texels, 0)) \
        if margin_texels > 0 else geo
    seen = np.nan_to_num(fields["coverage"]) >= min_views
    return grown & fields["valid"] & seen & ~fields["hidden"].astype(bool) & (cls != C.UNCOVERED)


def vertex_cells(uv: np.ndarray, valid: np.ndarray) -> tuple[np.ndarray, np.ndarray]:
    """(rows, cols) of the working-grid texel holding each vertex's UV, or of the nearest surface
    texel when that one is off the surface (vertices on a chart's rim)."""
    D = valid.shape[0]
    col = np.clip(np.floor(uv[:, 0] * D).astype(np.int64), 0, D - 1)
    row = np.clip(np.floor((1.0 - uv[:, 1]) * D).astype(np.int64), 0, D - 1)
    if valid.all() or not valid.any():
        return row, col
    _, (ri, ci) = ndimage.distance_transform_edt(~valid, return_indices=True)
    return ri[row, col], ci[row, col]


def build(mesh: SceneMesh, grid: TexelBuffer, fields: dict[str, np.ndarray], area: np.ndarray,
          inverse: np.ndarray, n_welded: int, *, margin_texels: int, min_views: int, fine_weight: float) -> Setup:
    """Evidence and pins for one round. grid: the working grid's TexelBuffer of `mesh`; area: (D, D)
    texel areas (scene units^2); inverse: (V,) welded index of each mesh vertex."""
    movable = movable_texels(fields, margin_texels, min_views)
    if "movable" in fields:      # surface moved in an earlier round stays open to correction
        movable |= fields["movable"].astype(bool) & fields["valid"] & ~fields["hidden"].astype(bool)
    d = fields["displacement"]
    measured = movable & np.isfinite(d)
    fine = movable & ~measured & (fields["cls"] == C.FINE)
    use = measured | fine
    tri = grid.tri[use].astype(np.int64)
    b1, b2 = grid.b1[use].astype(np.float64), grid.b2[use].astype(np.float64)
    target = np.where(measured[use], np.nan_to_num(d[use]), 0.0).astype(np.float64)
    weight = area[use] * np.where(measured[use], 1.0, fine_weight)
    ev = Evidence(face=tri, bary=np.stack([1.0 - b1 - b2, b1, b2], axis=1), target=target,
                  weight=weight.astype(np.float64))
    row, col = vertex_cells(mesh.uv, grid.valid)
    free_v = movable[row, col]
    pinned = np.ones(n_welded, bool)
    np.logical_and.at(pinned, inverse, ~free_v)      # pinned unless a copy of the vertex is movable...
    stuck = np.zeros(n_welded, bool)
    blocked = (np.nan_to_num(fields["coverage"][row, col]) < min_views) | fields["hidden"].astype(bool)[row, col]
    np.logical_or.at(stuck, inverse, blocked)         # ...and none of its copies is unseen or in a cavity
    return Setup(evidence=ev, pinned=pinned | stuck, movable=movable)
