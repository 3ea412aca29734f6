"""`featuretex scene=PATH out=DIR [overrides...]`: compose the config with Hydra and run the stages."""

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


@hydra.main(version_base="1.3", config_path="conf", config_name="featuretex")
def _hydra_main(cfg: DictConfig) -> dict:
    from featuretex.pipeline import run_pipeline

    conf = _to_config(cfg)
    out = Path(HydraConfig.get().runtime.output_dir)
    try:
        summary = run_pipeline(conf, out)
    except (InputError, OSError) as e:
        if HydraConfig.get().mode == RunMode.MULTIRUN:
            raise  # featuretex.batch.BatchIndex records it in failed.json; the batch goes on
        _fail(e, out)
    log.info("done: %s", out)
    return summary


def _fail(e: Exception, out: Path) -> None:
    """One line on stderr and a non-zero exit: 2 for bad input, 3 when the output cannot be written."""
    if isinstance(e, InputError):
        print(f"featuretex: {e}", file=sys.stderr)
        sys.exit(InputError.exit_code)
    if isinstance(e, OSError):  # disk full, read-only or vanished output folder: outputs stay whole (atomic)
        where = f" '{e.filename}'" if getattr(e, "filename", None) else ""
        print(f"featuretex: cannot write the output{where} in {out}: {e.strerror or e}", file=sys.stderr)
        sys.exit(OUTPUT_ERROR_EXIT)


def main() -> None:
    from featuretex.safety import check_argv, check_output_dir

    try:
        check_argv(sys.argv[1:])        # before Hydra can build anything a config names
        check_output_dir(sys.argv[1:])  # Hydra writes .hydra/ there before any of our code runs
        _hydra_main()
    except InputError as e:  # raised before the job starts (config validation)
        print(f"featuretex: {e}", file=sys.stderr)
        sys.exit(InputError.exit_code)
    except OSError as e:
        print(f"featuretex: cannot write the output '{e.filename}': {e.strerror or e}", file=sys.stderr)
        sys.exit(OUTPUT_ERROR_EXIT)


if __name__ == "__main__":
    main()
