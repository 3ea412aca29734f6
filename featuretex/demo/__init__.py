"""The bundled demo: a glazed, hand-painted ceramic jug photographed on a turntable for a shop catalogue.

Everything is invented and procedural. Ground truth: a jug 22 cm tall (unit: meter, +z up, base
at z = 0, spout towards +x, handle towards -x) made of a surface of revolution (foot, belly, a
raised decorative band, neck, rolled rim, inner wall) plus a swept handle, painted with a
procedural texture (bands, flowers, a zigzag on the raised band, two lines of fine lettering-like
strokes, iron speckles in the glaze), rendered with pyrender under soft fixed lighting.

The scan to fix is a coarser re-sampling of the same surface (fewer profile samples and azimuth
steps at other positions; the handle likewise), with: low-frequency noise along the normals
(0.5 mm RMS), one dent (4 mm deep at its centre, 2 cm radius), the raised band smoothed flat over a
90 degree sector, one hole about 1 cm across, and its own xatlas UV layout. The manifest's poses
are wrong by 0.15 degree and 0.5 mm per view.

`python -m featuretex.demo [--out DIR] [--small]` writes DIR/scene/ (the scene folder) and
DIR/ground_truth/ (true mesh, albedo, per-face error of the scan, defects, true poses).

Modules: `config` (sizes), `geometry` (the true jug's shape), `scan` (the scan and its defects),
`truth` (measuring the scan against the truth), `painting` (the albedo), `assembly` (scene folder
and ground truth), `bundled` (finding or generating the bundled scene).
"""

from featuretex.demo.assembly import build_demo, demo_views
from featuretex.demo.bundled import DEMO_VERSION, ensure_demo_scene, repo_demo_dir
from featuretex.demo.config import DemoConfig
from featuretex.demo.geometry import FLOOR, INNER, OUTER, dense_profile, handle_mesh, true_jug
from featuretex.demo.painting import paint_albedo
from featuretex.demo.scan import scan_jug
from featuretex.demo.truth import closest_distance, defect_faces, face_error

__all__ = ["DEMO_VERSION", "DemoConfig", "FLOOR", "INNER", "OUTER", "build_demo", "closest_distance",
           "defect_faces", "demo_views", "dense_profile", "ensure_demo_scene", "face_error", "handle_mesh",
           "paint_albedo", "repo_demo_dir", "scan_jug", "true_jug"]
