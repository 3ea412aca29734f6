"""Per-view data of the fit: what a step reads, kept compact and recomputed per crop.

Resident per view are only what cannot be recomputed cheaply: the photo as its decoded 8/16-bit
sRGB code values (3 or 6 bytes/pixel; the lookup table turns a window of them into exactly the
float32 linear values the photo decodes to) and the loss / score masks (1 byte/pixel each).
Geometry (uv, footprint, coverage, view direction and normal) is interpolated per crop or band
from the G-buffer, which stays on disk (read per window, see GBuffer.window), and the mesh, unless
the fit's memory budget lets a view keep it precomputed (GeometryCache: 61 bytes per pixel of the
view's object bounding box; same values, a crop is then a slice instead of arithmetic).
"""

from __future__ import annotations

from dataclasses import dataclass

import numpy as np
import torch
from scipy import ndimage

from featuretex.raster.gbuffer import GBuffer
from featuretex.scene.images import linear_table
from featuretex.scene.loaded import Scene
from featuretex.scene.manifest import View
from featuretex.scene.mesh import SceneMesh
from featuretex.texels.lod import face_uv_gradients, footprint_of, pixel_uv_jacobian

PHOTO_MARGIN = 16  # px of photo around a crop read for its alignment warp (more when a field moves further)
GEO_CHANNELS = 12


@dataclass(frozen=True)
class MeshTables:
    """Per-face rows every view's crops gather (one gather per pixel); built once per fit and
    shared by all views: 264 bytes per face (264 MB for a 1M-face scan)."""

    faces: np.ndarray   # (F, 33) float64: per corner uv (v up), world position, shading normal
                        # (3 x 8), d(u, v)/d(world position) (2 x 3, per scene unit), unit face normal (3)

    @property
    def nbytes(self) -> int:
        return self.faces.nbytes


def mesh_tables(mesh: SceneMesh, grads: np.ndarray | None = None) -> MeshTables:
    grads = face_uv_gradients(mesh) if grads is None else grads
    attrs = np.concatenate([mesh.uv, mesh.vertices, mesh.normals], axis=1).astype(np.float64)   # (V, 8)
    F = len(mesh.faces)
    return MeshTables(np.concatenate([attrs[mesh.faces].reshape(F, 24), grads.reshape(F, 6), mesh.face_normals], 1))


@dataclass(frozen=True)
class GeometryCache:
    """crop_geometry of a view's whole object bounding box, dense (0 off the mesh)."""

    r0: int                # top row of the box, pixels
    c0: int                # left column of the box, pixels
    cover: np.ndarray      # (h, w) bool
    uv: np.ndarray         # (h, w, 2) float32, v up
    rho: np.ndarray        # (h, w) float32, uv units per pixel
    geo: np.ndarray        # (h, w, 12) float32, as crop_geometry's

    @staticmethod
    def bytes_per_pixel() -> int:
        return 1 + 4 * (2 + 1 + GEO_CHANNELS)

    @property
    def nbytes(self) -> int:
        return sum(a.nbytes for a in (self.cover, self.uv, self.rho, self.geo))


@dataclass
class ViewData:
    name: str
    index: int                 # position among the fitted views; -1 for a held-out view
    view: View
    gbuf: GBuffer              # (H, W) on-disk G-buffer (memory map: not resident)
    tables: MeshTables         # shared by all views of the fit
    bbox: tuple[int, int, int, int] | None  # rows [r0, r1) x cols [c0, c1) holding every covered pixel
    photo: np.ndarray | None = None       # (3, H, W) uint8/uint16 sRGB code values
    loss_mask: np.ndarray | None = None   # (H, W) bool: cover ∩ photo mask, eroded
    score_mask: np.ndarray | None = None  # (H, W) bool: cover ∩ photo mask (as held-out scoring)
    row_start: np.ndarray | None = None   # (H + 1,) int64 loss-mask pixels before each row
    geometry: GeometryCache | None = None  # precomputed crop geometry (see cache_geometry)

    @property
    def shape(self) -> tuple[int, int]:
        return self.gbuf.shape

    def resident_nbytes(self) -> int:
        """Bytes this view holds in memory (the G-buffer map and the shared mesh tables excluded)."""
        return (sum(a.nbytes for a in (self.photo, self.loss_mask, self.score_mask, self.row_start) if a is not None)
                + (self.geometry.nbytes if self.geometry is not None else 0))

    def geometry_nbytes(self) -> int:
        """Bytes cache_geometry would hold."""
        if self.bbox is None:
            return 0
        r0, r1, c0, c1 = self.bbox
        return (r1 - r0) * (c1 - c0) * GeometryCache.bytes_per_pixel()

    def cache_geometry(self) -> None:
        """Precompute the geometry of the object's bounding box once, so that crops become slices."""
        if self.bbox is None or self.geometry is not None:
            return
        r0, r1, c0, c1 = self.bbox
        cover, uv, rho, geo = crop_geometry(self.gbuf.window(slice(r0, r1), slice(c0, c1)), (r0, c0),
                                            self.view, self.tables)
        uv_d = np.zeros(cover.shape + (2,), np.float32)
        rho_d = np.zeros(cover.shape, np.float32)
        uv_d[cover], rho_d[cover] = uv, rho
        self.geometry = GeometryCache(r0, c0, cover, uv_d, rho_d, geo)

    # --- crop centres ---------------------------------------------------------------------------

    @property
    def n_centres(self) -> int:
        """Pixels a crop may be centred on (those of the loss mask)."""
        return 0 if self.row_start is None else int(self.row_start[-1])

    def centre(self, k: int) -> tuple[int, int]:
        """(row, col) of the k-th loss-mask pixel in row-major order (= np.flatnonzero(loss)[k])."""
        assert self.row_start is not None and self.loss_mask is not None
        row = int(np.searchsorted(self.row_start, k, side="right")) - 1
        return row, int(np.flatnonzero(self.loss_mask[row])[k - self.row_start[row]])

    # --- per-crop tensors -----------------------------------------------------------------------

    def crop(self, rows: slice, cols: slice) -> tuple[torch.Tensor, torch.Tensor, torch.Tensor, torch.Tensor]:
        """Geometry of the window rows x cols (unit-step slices inside the image), as the model reads it:
        cover (h, w) bool, uv (N, 2) float32 (v up) and rho (N,) float32 uv units per pixel of the N
        covered pixels in row-major order, geo (12, h, w) float32 (view direction, normal in camera
        then world axes; 0 off the mesh) in channels-last memory (strides (1, 12 w, 12))."""
        r0, _, _ = rows.indices(self.shape[0])
        c0, _, _ = cols.indices(self.shape[1])
        if self.geometry is not None:
            cover, uv, rho, geo = self._cached_crop(rows, cols)
        else:
            cover, uv, rho, geo = crop_geometry(self.gbuf.window(rows, cols), (r0, c0), self.view, self.tables)
        geo_t = torch.from_numpy(geo).permute(2, 0, 1)   # a channels-last view: the decoder's convs run in that layout
        return torch.from_numpy(cover), torch.from_numpy(uv), torch.from_numpy(rho), geo_t

    def _cached_crop(self, rows: slice, cols: slice) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
        """crop_geometry's outputs for the window, sliced from the cache (the part outside the box is empty)."""
        g = self.geometry
        assert g is not None
        r0, r1, _ = rows.indices(self.shape[0])
        c0, c1, _ = cols.indices(self.shape[1])
        h, w = r1 - r0, c1 - c0
        cover = np.zeros((h, w), bool)
        geo = np.zeros((h, w, GEO_CHANNELS), np.float32)
        uv = np.zeros((h, w, 2), np.float32)
        rho = np.zeros((h, w), np.float32)
        gh, gw = g.cover.shape
        ya, yb = max(r0, g.r0), min(r1, g.r0 + gh)     # window ∩ box, image rows / cols
        xa, xb = max(c0, g.c0), min(c1, g.c0 + gw)
        if ya < yb and xa < xb:
            dst = (slice(ya - r0, yb - r0), slice(xa - c0, xb - c0))
            src = (slice(ya - g.r0, yb - g.r0), slice(xa - g.c0, xb - g.c0))
            cover[dst], geo[dst], uv[dst], rho[dst] = g.cover[src], g.geo[src], g.uv[src], g.rho[src]
        return cover, uv[cover], rho[cover], geo

    def photo_window(self, r0: int, r1: int, c0: int, c1: int) -> torch.Tensor:
        """(3, r1 - r0, c1 - c0) float32 linear photo over rows [r0, r1) x cols [c0, c1), which may
        reach outside the image: outside pixels repeat the nearest edge pixel."""
        assert self.photo is not None
        H, W = self.shape
        if 0 <= r0 and r1 <= H and 0 <= c0 and c1 <= W:
            levels = self.photo[:, r0:r1, c0:c1]
        else:
            levels = self.photo[:, np.clip(np.arange(r0, r1), 0, H - 1)][:, :, np.clip(np.arange(c0, c1), 0, W - 1)]
        return torch.from_numpy(linear_table(self.photo.dtype.name)[levels])


def crop_geometry(gb: GBuffer, origin: tuple[int, int], view: View, t: MeshTables
                  ) -> tuple[np.ndarray, np.ndarray, np.ndarray, np.ndarray]:
    """cover (h, w) bool, uv (N, 2), rho (N,), geo (h, w, 12) float32 (channels last) of the window `gb`
    whose top-left pixel is `origin` = (row, col) of the full image (the footprint needs absolute
    pixel coords).

    The arithmetic of GBuffer.uv / position / normal (float64 barycentric sums, then float32) and
    lod.uv_footprint, done once for all attributes and only at covered pixels.
    """
    h, w = gb.shape
    tri = gb.data["tri"].reshape(-1)
    idx = np.flatnonzero(tri >= 0)
    ys, xs = np.divmod(idx, w)
    rows = np.take(t.faces, tri[idx], axis=0)                        # (N, 33)
    b1 = gb.data["b1"].reshape(-1)[idx].astype(np.float64)
    b2 = gb.data["b2"].reshape(-1)[idx].astype(np.float64)
    bary = np.stack([1 - b1 - b2, b1, b2], axis=1)
    att = np.einsum("nk,nkc->nc", bary, rows[:, :24].reshape(-1, 3, 8)).astype(np.float32)   # (N, 8)
    dirs = np.empty((len(idx), 2, 3), np.float32)                    # view direction, shading normal
    np.subtract(att[:, 2:5], view.centre.astype(np.float32), out=dirs[:, 0])   # camera -> surface
    dirs[:, 1] = att[:, 5:8]
    dirs /= np.maximum(np.sqrt(np.einsum("nij,nij->ni", dirs, dirs)), 1e-12)[:, :, None]   # as GBuffer.normal
    geo = np.empty((len(idx), GEO_CHANNELS), np.float32)           # pixel-major: rows scatter fastest
    geo[:, :6] = (dirs.reshape(-1, 3) @ view.R.astype(np.float32).T).reshape(-1, 6)   # camera axes
    geo[:, 6:] = dirs.reshape(-1, 6)                                                   # world axes
    if len(idx) < h * w:
        dense = np.zeros((h * w, GEO_CHANNELS), np.float32)
        dense[idx] = geo
        geo = dense
    J = pixel_uv_jacobian(rows[:, 24:30].reshape(-1, 2, 3), rows[:, 30:33], gb.data["depth"].reshape(-1)[idx],
                          xs + origin[1], ys + origin[0], view)
    return (tri >= 0).reshape(h, w), att[:, :2].copy(), footprint_of(J), geo.reshape(h, w, GEO_CHANNELS)


def _bbox(mask: np.ndarray) -> tuple[int, int, int, int] | None:
    rows, cols = np.flatnonzero(mask.any(1)), np.flatnonzero(mask.any(0))
    if len(rows) == 0:
        return None
    return int(rows[0]), int(rows[-1]) + 1, int(cols[0]), int(cols[-1]) + 1


def prepare_view(scene: Scene, gbuf: GBuffer, view: View, index: int, *, erode_px: int,
                 tables: MeshTables | None = None, with_photo: bool = True) -> ViewData:
    """Resident data of one view; with_photo adds the photo code values and the loss / score masks."""
    tables = mesh_tables(scene.mesh) if tables is None else tables
    cov = gbuf.window(slice(None), slice(None)).coverage     # one read of the file, not kept
    vd = ViewData(name=view.name, index=index, view=view, gbuf=gbuf, tables=tables, bbox=_bbox(cov))
    if with_photo:
        pm = scene.photo_mask(view)
        score = cov & pm if pm is not None else cov
        loss = ndimage.binary_erosion(score, iterations=erode_px, border_value=0) if erode_px > 0 else score
        vd.photo = np.ascontiguousarray(scene.photo_levels(view).transpose(2, 0, 1))
        vd.loss_mask = np.ascontiguousarray(loss)
        vd.score_mask = np.ascontiguousarray(score)
        vd.row_start = np.concatenate([[0], np.cumsum(loss.sum(1))]).astype(np.int64)
    return vd
