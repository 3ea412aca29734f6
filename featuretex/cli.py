"""`featuretex PATH [out=DIR] [overrides...]`: check the command, compose the configuration with
Hydra and run the stages.

Before Hydra acts: the command line is rewritten for Hydra's parser (featuretex/arguments.py), checked
for anything that could run code (featuretex/safety.py), every job's configuration is composed and
checked (featuretex/preflight.py), the run folder is created and locked (featuretex/runlock.py).
Problems end the command with one line on stderr: exit status 2 for bad input, 3 when the output
cannot be written.
"""

from __future__ import annotations

import logging
import os
import sys
from pathlib import Path

os.environ.setdefault("PYOPENGL_PLATFORM", "egl")  # headless OpenGL for previews (pyrender)

import hydra
from hydra.core.hydra_config import HydraConfig
from hydra.types import RunMode
from omegaconf import DictConfig, OmegaConf

from featuretex.config import FeaturetexConfig, register
from featuretex.errors import InputError

log = logging.getLogger("featuretex")
OUTPUT_ERROR_EXIT = 3
register()


def _to_config(cfg: DictConfig) -> FeaturetexConfig:
    return OmegaConf.to_object(cfg)  # type: ignore[return-value]


@hydra.main(version_base="1.3", config_path="pkg://featuretex.conf", config_name="featuretex")
def _hydra_main(cfg: DictConfig) -> dict:
    from featuretex.pipeline import run_pipeline
    from featuretex.preflight import check_out_and_scene
    from featuretex.runlock import run_folder_lock
    from featuretex.settings import check_settings

    out = Path(HydraConfig.get().runtime.output_dir)
    try:
        conf = _to_config(cfg)
        check_settings(conf)              # the command line checked already; a job on a cluster node checks again
        check_out_and_scene(out, conf.scene)
        with run_folder_lock(out):        # held already by this process in a single run
            summary = run_pipeline(conf, out)
    except (InputError, OSError) as e:
        if HydraConfig.get().mode == RunMode.MULTIRUN:
            raise  # featuretex.batch.BatchIndex records it in failed.json; the batch goes on
        _fail(e, out)
    log.info("done: %s", out)
    return summary


def _fail(e: Exception, out: Path | None) -> None:
    """One line on stderr and a non-zero exit: 2 for bad input, 3 when the output cannot be written."""
    if isinstance(e, InputError):
        print(f"featuretex: {e}", file=sys.stderr)
        sys.exit(InputError.exit_code)
    if isinstance(e, OSError):  # disk full, read-only or vanished output folder: outputs stay whole (atomic)
        where = f" '{e.filename}'" if getattr(e, "filename", None) else ""
        inside = f" in {out}" if out is not None else ""
        print(f"featuretex: cannot write the output{where}{inside}: {e.strerror or e}", file=sys.stderr)
        sys.exit(OUTPUT_ERROR_EXIT)
    raise e


def main() -> None:
    from featuretex.arguments import parse
    from featuretex.preflight import prepare
    from featuretex.runlock import run_folder_lock
    from featuretex.safety import check_argv, check_output_dir

    try:
        arguments = parse(sys.argv[1:])
        check_argv(arguments.argv)         # before Hydra can build anything a config names
    except InputError as e:
        _fail(e, None)
    if not arguments.runs_job:             # --help, --cfg, --info, ...: Hydra answers, nothing runs
        sys.argv = [sys.argv[0], *arguments.argv]
        _hydra_main()
        return
    try:
        plan = prepare(arguments)          # every job composed and checked, before any stage runs
        check_output_dir(plan.folder)      # Hydra writes .hydra/ there before any of our code runs
        with run_folder_lock(plan.folder):
            sys.argv = [sys.argv[0], *plan.argv]
            _hydra_main()
    except (InputError, OSError) as e:
        _fail(e, None)


if __name__ == "__main__":
    main()
