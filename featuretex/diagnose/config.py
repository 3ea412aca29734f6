"""Every threshold of the diagnosis (`diagnose.*`), each with what it allows. Lengths are a
fraction of the object size (the diagonal of the mesh's bounding box) unless a `*_units` override in
scene units is set (> 0).
"""

from __future__ import annotations

from dataclasses import dataclass

from featuretex.settings import setting


@dataclass
class DiagnoseConfig:
    # working grid: the diagnosis runs on its own UV grid about one photo pixel per texel
    max_grid: int = setting(256, ge=16, le=8192)  # texels per side at most (speed); fields are resampled to the texture
    min_grid: int = setting(32, ge=4, le=8192)
    # coverage: which views count as seeing a texel
    min_cos: float = setting(0.26, ge=0, lt=1)  # steeper than ~75 deg from the normal is too grazing (common practice)
    max_footprint_ratio: float = setting(3.0, gt=1)  # a view whose pixel is > this x the scene's median pixel footprint is too far
    depth_tol_px: float = setting(2.0, gt=0)  # visibility: allowed depth gap, in pixel footprints
    edge_erode_px: int = setting(2, ge=0, le=256)  # drop samples this close to a silhouette or an occlusion edge
    occlusion_jump: float = setting(0.02, gt=0)  # a depth step over 3 x 3 pixels larger than this x depth is an occlusion edge
    min_views: int = setting(2, ge=1, le=1000)  # 'uncovered' = seen by fewer usable views than this
    # uncovered surface open to less of its hemisphere than this is a
    # cavity no outside camera sees well: not counted towards a rescan
    min_exposure: float = setting(0.25, ge=0, le=1)
    exposure_rays: int = setting(32, ge=1, le=4096)
    # photo-consistency: patch normalised cross-correlation on the UV grid
    judge_min_cos: float = setting(0.45, ge=0, lt=1)  # views judging consistency / offsets see the texel within ~63 deg of its normal
    patch: int = setting(5, ge=3, le=63, odd=True)  # patch edge, texels of the working grid (odd)
    min_patch_fill: float = setting(0.6, gt=0, le=1)  # fraction of a patch that must be seen for its NCC to count
    min_contrast: float = setting(0.012, ge=0)  # patch std (sRGB grey) below which a patch has no texture to judge
    trim: float = setting(0.25, ge=0, lt=1)  # share of the worst views' scores dropped per texel (highlights, occlusion)
    # displacement sweep along the normal (plane sweep, as multi-view stereo does)
    sweep_fraction: float = setting(0.03, gt=0, le=1)  # half range, fraction of the object size
    sweep_units: float = setting(0.0, ge=0)  # half range in scene units (> 0 overrides the fraction)
    sweep_steps: int = setting(25, ge=3, le=1001, odd=True)  # offsets tested over [-range, +range] (odd, so 0 is one of them)
    aggregate: int = setting(5, ge=1, le=255)  # box (texels) over which sweep scores are pooled before the argmax
    sweep_min_gain: float = setting(0.04, ge=0)  # NCC gain of the best offset over offset 0 that counts as confident
    sweep_min_score: float = setting(0.3, ge=-1, le=1)  # and the best offset's NCC must reach this
    sweep_min_views: int = setting(5, ge=1)  # and at least this many views must see the texel
    # alignment evidence (the fit's per-view fields)
    align_remove_global: bool = True  # subtract each view's median shift (calibration) before local use
    # silhouette consistency (silhouette.py): the mesh's outline against the photo masks
    silhouette: bool = True          # use it when views have photo masks
    # an outline pixel counts when |cos(normal, ray)| <= this (>= ~70 deg):
    # a pixel centre sits < 1 px inside the outline, which on a surface of
    # radius rho px gives cos ~ sqrt(2 / rho) (0.2 at 50 px); the rim of a
    # hole or an open edge seen from the front has a larger cos
    silhouette_max_cos: float = setting(0.35, ge=0, le=1)
    silhouette_deadband_px: float = setting(1.0, ge=0)  # |gap| <= this (px) is mask thresholding / pixel quantisation: 0
    # gaps are clipped to this (px): beyond it the nearest mask edge is
    # as likely another part of the object as the same surface
    silhouette_max_gap_px: float = setting(20.0, gt=0)
    silhouette_min_pixels: int = setting(50, ge=1)  # a view's outline needs this many pixels for its calibration fit
    # subtract each view's robust global mask-vs-mesh fit (shift,
    # in-plane rotation, uniform dilation: calibration, mask threshold)
    silhouette_remove_global: bool = True
    # Gaussian sigma of the spread over the surface, fraction of size:
    # outline lines of ~10 views per ring around an object of radius
    # ~size / 5 lie ~0.06 size apart, so a reach of 2 sigma covers the
    # space between neighbouring lines without blurring a defect away
    silhouette_spread_fraction: float = setting(0.02, gt=0, le=1)
    silhouette_spread_units: float = setting(0.0, ge=0)  # sigma in scene units (> 0 overrides the fraction)
    # spread only where the measurement support is >= this:
    # exp(-2), i.e. within 2 sigma of one line of outline texels
    silhouette_min_support: float = setting(0.135, ge=0, le=1)
    # tolerances of the per-texel fields (0.5 is reached at the tolerance)
    geometry_tol_fraction: float = setting(0.004, gt=0, le=1)  # misplacement that counts as geometry error, fraction of size
    geometry_tol_units: float = setting(0.0, ge=0)
    texture_tol: float = setting(0.03, gt=0)  # consistent residual (sRGB RMS over a patch) that counts as under-fit
    min_region: int = setting(9, ge=1)  # geometry / texture regions smaller than this (working texels) are dropped
    # texture under-fit qualifiers
    still_falling: float = setting(0.02, ge=0, le=1)  # relative loss drop over the last `tail` of the fit = still improving
    tail: float = setting(0.25, gt=0, le=1)  # fraction of the fit's steps examined for a falling loss
    footprint_ratio_tol: float = setting(1.5, gt=0)  # texture texel > this x the photo pixel = a larger texture would help
    settled_texture_weight: float = setting(0.5, ge=0, le=1)  # under-fit evidence weight when neither qualifier holds
    # verdict rules, surface-area fractions
    rescan_uncovered: float = setting(0.05, ge=0, le=1)  # rescan when more open (non-cavity) surface than this is uncovered
    rescan_geometry: float = setting(0.35, ge=0, le=1)  # rescan when more than this is geometry-limited (beyond a fix)
    fix_geometry_area: float = setting(0.003, ge=0, le=1)  # fix-geometry when geometry-limited area exceeds this ...
    fix_displacement_fraction: float = setting(0.004, ge=0, le=1)  # ... and its misplacement (90th pct) exceeds this fraction of size
    fix_displacement_units: float = setting(0.0, ge=0)
    refine_texture_area: float = setting(0.05, ge=0, le=1)  # refine-texture when texture-limited area exceeds this
    refine_dominance: float = setting(1.0, ge=0)  # ... and is at least this x the geometry-limited area
    regions_reported: int = setting(3, ge=0, le=100)  # largest regions named in the reasons

    def relations(self):
        if self.min_grid > self.max_grid:
            yield "min_grid", f"must not exceed diagnose.max_grid ({self.max_grid})"
