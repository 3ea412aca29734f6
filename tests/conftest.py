import os
from pathlib import Path

import pytest

os.environ.setdefault("PYOPENGL_PLATFORM", "egl")  # headless OpenGL for pyrender references


@pytest.fixture(scope="session")
def pipeline_run(tmp_path_factory) -> Path:
    """One real run of the whole command on a tiny scene, shared by the report tests. Tests read
    it; a test that changes files works on a copy."""
    from test_report_fixtures import make_run_dir

    return make_run_dir(tmp_path_factory.mktemp("pipeline"))
