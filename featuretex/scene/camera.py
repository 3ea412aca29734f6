"""Camera intrinsics: pinhole and Brown–Conrady (OpenCV coefficient order k1, k2, p1, p2, k3).

Conventions (docs/contracts.md, section 5): camera axes +x right, +y down, +z forward; pixel (0, 0) is the
centre of the top-left pixel, so pixel centres sit at integer coordinates.
"""

from __future__ import annotations

from dataclasses import dataclass, field

import numpy as np

MODELS = ("pinhole", "brown")


@dataclass(frozen=True)
class Camera:
    """Intrinsics shared by views. Lengths in pixels."""

    id: str
    model: str
    width: int
    height: int
    fx: float
    fy: float
    cx: float
    cy: float
    distortion: tuple[float, float, float, float, float] = field(default=(0.0, 0.0, 0.0, 0.0, 0.0))
    axes: str = "opencv"   # how scene.yaml's poses for this camera were written; poses are converted on reading

    @property
    def distorted(self) -> bool:
        return self.model == "brown" and any(abs(c) > 0 for c in self.distortion)

    @property
    def K(self) -> np.ndarray:
        """(3, 3) float64 intrinsic matrix."""
        return np.array([[self.fx, 0, self.cx], [0, self.fy, self.cy], [0, 0, 1]], dtype=np.float64)

    # --- normalised image plane <-> distorted normalised plane -------------------------------
    def distort(self, xy: np.ndarray) -> np.ndarray:
        """(N, 2) ideal normalised coords -> (N, 2) distorted normalised coords."""
        if not self.distorted:
            return np.asarray(xy, dtype=np.float64)
        k1, k2, p1, p2, k3 = self.distortion
        x, y = xy[:, 0], xy[:, 1]
        r2 = x * x + y * y
        radial = 1 + r2 * (k1 + r2 * (k2 + r2 * k3))
        xd = x * radial + 2 * p1 * x * y + p2 * (r2 + 2 * x * x)
        yd = y * radial + p1 * (r2 + 2 * y * y) + 2 * p2 * x * y
        return np.stack([xd, yd], axis=1)

    def undistort(self, xyd: np.ndarray, iterations: int = 20) -> np.ndarray:
        """(N, 2) distorted normalised coords -> (N, 2) ideal ones, by Newton's method.

        Newton (not OpenCV's fixed-point loop) so strong distortion still converges to ~1e-12.
        """
        xyd = np.asarray(xyd, dtype=np.float64)
        if not self.distorted:
            return xyd
        k1, k2, p1, p2, k3 = self.distortion
        xy = xyd.copy()
        for _ in range(iterations):
            x, y = xy[:, 0], xy[:, 1]
            r2 = x * x + y * y
            radial = 1 + r2 * (k1 + r2 * (k2 + r2 * k3))
            dradial = k1 + r2 * (2 * k2 + 3 * k3 * r2)  # d radial / d r2
            fx = x * radial + 2 * p1 * x * y + p2 * (r2 + 2 * x * x) - xyd[:, 0]
            fy = y * radial + p1 * (r2 + 2 * y * y) + 2 * p2 * x * y - xyd[:, 1]
            j11 = radial + 2 * x * x * dradial + 2 * p1 * y + 6 * p2 * x
            j12 = 2 * x * y * dradial + 2 * p1 * x + 2 * p2 * y
            j21 = 2 * x * y * dradial + 2 * p1 * x + 2 * p2 * y
            j22 = radial + 2 * y * y * dradial + 6 * p1 * y + 2 * p2 * x
            det = j11 * j22 - j12 * j21
            det = np.where(np.abs(det) < 1e-12, 1e-12, det)
            dx = (j22 * fx - j12 * fy) / det
            dy = (-j21 * fx + j11 * fy) / det
            xy[:, 0] -= dx
            xy[:, 1] -= dy
            if max(np.abs(dx).max(initial=0), np.abs(dy).max(initial=0)) < 1e-14:
                break
        return xy

    # --- camera space <-> pixels ---------------------------------------------------------------
    def project(self, pts_cam: np.ndarray) -> np.ndarray:
        """(N, 3) points in camera coords -> (N, 2) pixel coords (x right, y down). z must be > 0."""
        pts_cam = np.asarray(pts_cam, dtype=np.float64)
        z = pts_cam[:, 2]
        xy = pts_cam[:, :2] / np.where(np.abs(z) < 1e-12, 1e-12, z)[:, None]
        xyd = self.distort(xy)
        return np.stack([self.fx * xyd[:, 0] + self.cx, self.fy * xyd[:, 1] + self.cy], axis=1)

    def unproject(self, px: np.ndarray) -> np.ndarray:
        """(N, 2) pixel coords -> (N, 3) ray directions in camera coords with z = 1."""
        px = np.asarray(px, dtype=np.float64)
        xyd = np.stack([(px[:, 0] - self.cx) / self.fx, (px[:, 1] - self.cy) / self.fy], axis=1)
        xy = self.undistort(xyd)
        return np.concatenate([xy, np.ones((len(xy), 1))], axis=1)

    def pixel_rays(self) -> np.ndarray:
        """(H*W, 3) float64 ray directions (z = 1) through every pixel centre, row-major."""
        ys, xs = np.mgrid[0:self.height, 0:self.width]
        px = np.stack([xs.ravel(), ys.ravel()], axis=1).astype(np.float64)
        return self.unproject(px)

    def content_key(self) -> str:
        """Stable text of every field, for cache keys."""
        d = ",".join(f"{c:.17g}" for c in self.distortion)
        return (f"{self.model}|{self.width}x{self.height}|{self.fx:.17g},{self.fy:.17g},"
                f"{self.cx:.17g},{self.cy:.17g}|{d}")
