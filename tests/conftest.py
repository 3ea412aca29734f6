import os

os.environ.setdefault("PYOPENGL_PLATFORM", "egl")  # headless OpenGL for pyrender references
