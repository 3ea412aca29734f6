"""Batches: a Hydra multirun of many scans, each in its own job folder, then one index of them all.

`BatchIndex` is a Hydra callback (config: `hydra.callbacks.batch_index._target_:
featuretex.batch.BatchIndex`):

* at the end of each job (in the job's own process, also on a cluster node) a job that raised is
  written down as `<job dir>/failed.json` and handed back to Hydra as finished, so one bad scan
  never stops the others (Hydra's sweepers abort the whole batch on a failed job otherwise);
* at the end of the multirun (on the launching machine) it writes `batch.csv` and `batch.html` in
  the sweep folder: one row per job, the scans needing the most work first.

`python -m featuretex.batch SWEEP_DIR` writes the same index again (after a batch was killed).
"""

from __future__ import annotations

import csv
import io
import json
import logging
import math
import re
import sys
import time
import traceback
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import yaml
from hydra.core.utils import JobReturn, JobStatus
from hydra.experimental.callback import Callback
from hydra.types import RunMode
from omegaconf import DictConfig

from featuretex.atomic import write_json, write_text
from featuretex.report import scripts
from featuretex.report.context import PREVIEW_FILE
from featuretex.report.inline import esc, num, percent, seconds, thumbnail_uri
from featuretex.report.style import CSS
from featuretex.report.verdicts import describe, rank

log = logging.getLogger("featuretex")

FAILED_FILE, CSV_FILE, HTML_FILE = "failed.json", "batch.csv", "batch.html"
METHODS = ("baseline", "baked", "neural")
AREAS = ("uncovered", "geometry_limited", "texture_limited")
CLOCK_SLACK_S = 5.0   # a job folder written this long before the batch started still belongs to it
THUMB_PX = 96         # the model's still in the index, pixels


# ---------------------------------------------------------------------------------------------
# one job
# ---------------------------------------------------------------------------------------------
@dataclass
class JobRow:
    """What the index shows of one job folder."""

    job: str                          # job folder, relative to the sweep folder ("0", "1", ...)
    scan: str                         # the scan's name: `scan=` override, else its scene folder
    status: str                       # "done" | "failed"
    scene: str = ""
    verdict: str | None = None
    reasons: list[str] = field(default_factory=list)
    areas: dict[str, float | None] = field(default_factory=dict)
    psnr: dict[str, float | None] = field(default_factory=dict)
    timings: dict[str, float] = field(default_factory=dict)
    overrides: list[str] = field(default_factory=list)
    report: str | None = None         # report.html relative to the sweep folder
    preview: str | None = None        # a small still of the delivered model (data URI), if the report made one
    log: str | None = None            # the job's log file, relative to the sweep folder
    error: str | None = None

    @property
    def state(self) -> str:
        """Verdict for finished scans, 'failed' for failed ones ('' = finished without a verdict)."""
        return "failed" if self.status == "failed" else (self.verdict or "")


def _overrides(job_dir: Path) -> list[str]:
    p = job_dir / ".hydra" / "overrides.yaml"
    try:
        loaded = yaml.safe_load(p.read_text(encoding="utf-8")) if p.is_file() else []
    except yaml.YAMLError:
        return []
    return [str(o) for o in loaded] if isinstance(loaded, list) else []


def _override_value(overrides: list[str], key: str) -> str | None:
    for o in overrides:
        k, sep, v = o.lstrip("+~").partition("=")
        if sep and k == key:
            return v
    return None


def scan_name(overrides: list[str], scene: str, job: str) -> str:
    """The `scan=` override of a batch file, else the scene's folder name, else the job folder."""
    named = _override_value(overrides, "scan")
    if named:
        return named
    if scene and scene != "demo":
        p = Path(scene)
        return (p.parent.name if p.suffix in (".yaml", ".yml") else p.name) or job
    return scene or job


def _json(path: Path) -> dict[str, Any] | None:
    try:
        data = json.loads(path.read_text(encoding="utf-8"))
    except (OSError, ValueError):
        return None
    return data if isinstance(data, dict) else None


def read_job(job_dir: Path, sweep_dir: Path) -> JobRow:
    rel = job_dir.relative_to(sweep_dir).as_posix()
    overrides = _overrides(job_dir)
    logs = sorted(job_dir.glob("*.log"))
    log_rel = logs[0].relative_to(sweep_dir).as_posix() if logs else None
    report = job_dir / "report.html"
    report_rel = report.relative_to(sweep_dir).as_posix() if report.is_file() else None
    failed = _json(job_dir / FAILED_FILE) if (job_dir / FAILED_FILE).is_file() else None
    summary = None if failed is not None else _json(job_dir / "summary.json")
    scene = str((failed or summary or {}).get("scene") or _override_value(overrides, "scene") or "")
    row = JobRow(job=rel, scan=scan_name(overrides, scene, rel), status="done", scene=scene,
                 overrides=overrides, report=report_rel, log=log_rel)
    if (job_dir / PREVIEW_FILE).is_file():
        try:
            row.preview = thumbnail_uri(job_dir / PREVIEW_FILE, THUMB_PX)[0]
        except OSError as e:   # a damaged preview only costs the picture
            log.warning("batch: %s unreadable (%s)", job_dir / PREVIEW_FILE, e)
    if failed is not None or summary is None:
        row.status = "failed"
        row.error = (failed or {}).get("error") or "the job stopped before writing summary.json (see its log)"
        return row
    row.verdict = summary.get("verdict") or None
    row.reasons = [str(r) for r in summary.get("reasons") or []]
    row.areas = {k: (summary.get("areas") or {}).get(k) for k in AREAS}
    row.psnr = {m: ((summary.get("heldout") or {}).get(m) or {}).get("psnr") for m in METHODS}
    row.timings = {k: v for k, v in (summary.get("timings_s") or {}).items() if isinstance(v, (int, float))}
    return row


def find_job_dirs(sweep_dir: Path, since: float | None = None) -> list[Path]:
    """Job folders under `sweep_dir` (they hold .hydra/overrides.yaml), leaving out folders from an
    earlier batch into the same place (not rewritten since `since`, a time.time() value)."""
    found = []
    for ovr in sweep_dir.rglob(".hydra/overrides.yaml"):
        job = ovr.parent.parent
        if ".submitit" in job.relative_to(sweep_dir).parts:
            continue
        if since is not None and ovr.stat().st_mtime < since - CLOCK_SLACK_S:
            continue
        found.append(job)
    return found


def _natural(s: str) -> list[Any]:
    return [int(t) if t.isdigit() else t for t in re.split(r"(\d+)", s)]


def _quality(row: JobRow) -> float:
    """Best held-out PSNR the scan reached (for ordering: the worse one first); inf when unknown."""
    vals = [float(v) for v in (row.psnr.get("neural"), row.psnr.get("baked"), row.psnr.get("baseline"))
            if v is not None and math.isfinite(float(v))]
    return vals[0] if vals else math.inf


def sort_rows(rows: list[JobRow]) -> list[JobRow]:
    """Most work first: rescan, failed, fix-geometry, refine-texture, no verdict, ready; within
    one verdict the lowest held-out PSNR first, then by job folder."""
    return sorted(rows, key=lambda r: (rank(r.state), _quality(r), _natural(r.job)))


# ---------------------------------------------------------------------------------------------
# the index files
# ---------------------------------------------------------------------------------------------
def _timing_keys(rows: list[JobRow]) -> list[str]:
    keys: dict[str, None] = {}
    for r in rows:
        keys.update(dict.fromkeys(k for k in r.timings if k != "total"))
    return [*keys, "total"]


def _cell(v: Any) -> str:
    if v is None:
        return ""
    return repr(v) if isinstance(v, float) else str(v)


def batch_csv(rows: list[JobRow]) -> str:
    """CSV text: one row per job, numbers at full precision (repr: they read back exactly)."""
    tkeys = _timing_keys(rows)
    head = (["scan", "status", "verdict", "reasons", *(f"area_{a}" for a in AREAS),
             *(f"psnr_{m}" for m in METHODS), *(f"seconds_{k}" for k in tkeys),
             "scene", "overrides", "report", "log", "job", "error"])
    buf = io.StringIO()
    w = csv.writer(buf, lineterminator="\n")
    w.writerow(head)
    for r in rows:
        w.writerow([r.scan, r.status, r.verdict or "", " | ".join(r.reasons),
                    *(_cell(r.areas.get(a)) for a in AREAS), *(_cell(r.psnr.get(m)) for m in METHODS),
                    *(_cell(r.timings.get(k)) for k in tkeys), r.scene, " ".join(r.overrides),
                    r.report or "", r.log or "", r.job, r.error or ""])
    return buf.getvalue()


def _chip(state: str) -> str:
    word, _, colour = describe(state or None)
    return f'<span class="chip" style="--v:{colour}">{esc(word)}</span>'


def _counts_html(rows: list[JobRow]) -> str:
    counts: dict[str, int] = {}
    for r in rows:
        counts[r.state] = counts.get(r.state, 0) + 1
    parts = [f"{_chip(s)} × {n}" for s, n in sorted(counts.items(), key=lambda kv: rank(kv[0]))]
    return " ".join(parts)


def _key(v: float | None) -> str:
    """A sort key for a number cell (empty: sorts after every number)."""
    return "" if v is None or not math.isfinite(float(v)) else repr(float(v))


def _row_html(r: JobRow, order: int) -> str:
    name = f'<a href="{esc(r.report)}">{esc(r.scan)}</a>' if r.report else esc(r.scan)
    logl = f' · <a href="{esc(r.log)}">log</a>' if r.log else ""
    sub = f'<div class="note">folder {esc(r.job)}{logl}</div>'
    pic = f'<img class="thumb" src="{r.preview}" alt="{esc(r.scan)}, delivered model">' if r.preview else ""
    thumb = f'<td data-key="{order}">' + (f'<a href="{esc(r.report)}" tabindex="-1">{pic}</a>' if r.report and pic
                                          else pic) + "</td>"
    state = f'<td data-key="{rank(r.state)}">{_chip(r.state)}'
    if r.status == "failed":
        return (f"<tr>{thumb}<td>{name}{sub}</td>{state}</td>"
                f'<td colspan="7">{esc(r.error)}</td></tr>')
    why = esc(r.reasons[0]) + (f' <span class="note">(+{len(r.reasons) - 1} more)</span>'
                               if len(r.reasons) > 1 else "") if r.reasons else ""
    areas = "".join(f'<td class="n" data-key="{_key(r.areas.get(a))}">'
                    f'{percent(r.areas.get(a)) if r.areas.get(a) is not None else "—"}</td>' for a in AREAS)
    base = r.psnr.get("baseline")
    psnr = []
    for m in METHODS:
        v = r.psnr.get(m)
        gain = (f'<div class="note">{float(v) - float(base):+.2f}</div>'
                if m != "baseline" and v is not None and base is not None else "")
        psnr.append(f'<td class="n" data-key="{_key(v)}">{num(v, 2)}{gain}</td>')
    total = r.timings.get("total")
    return (f'<tr>{thumb}<td>{name}{sub}</td>{state}<div class="note">{why}</div></td>{areas}'
            f'{"".join(psnr)}<td class="n" data-key="{_key(total)}">{seconds(total)}</td></tr>')


HEADINGS = (("", ""), ("scan", ""), ("verdict", ""), ("uncovered", "n"), ("geometry-limited", "n"),
            ("texture-limited", "n"), ("classical dB", "n"), ("delivered dB", "n"), ("neural dB", "n"),
            ("time", "n"))


def batch_html(rows: list[JobRow], sweep_dir: Path) -> str:
    sorter = scripts.asset("js/sort.js")
    head = "".join(f'<th class="{c}" data-sort><button type="button">{esc(h)}</button></th>' if h else "<th></th>"
                   for h, c in HEADINGS)
    body = "".join(_row_html(r, k) for k, r in enumerate(rows)) or \
        f'<tr><td colspan="{len(HEADINGS)}">no jobs found</td></tr>'
    return ("<!doctype html>\n<html lang=\"en\"><head><meta charset=\"utf-8\">"
            '<meta name="viewport" content="width=device-width, initial-scale=1">'
            f'<meta http-equiv="Content-Security-Policy" content="{scripts.policy([sorter])}">'
            f"<title>Batch: {len(rows)} scans</title><style>{CSS}</style></head><body><main>"
            f'<header class="top"><h1>Batch of {len(rows)} scan{"s" if len(rows) != 1 else ""}</h1>'
            f'<span class="meta">{esc(sweep_dir)} · {time.strftime("%Y-%m-%d %H:%M")}</span></header>'
            f'<section><p>{_counts_html(rows)}</p><p class="note">Scans that need the most work come first; click '
            "a column heading to sort by it. Areas are shares of each scan's surface; dB is the held-out PSNR "
            "(higher is better), with the gain over the classical bake below it. The scan name or its picture "
            "opens its report.</p>"
            f'<div class="scroll"><table class="sortable"><thead><tr>{head}</tr></thead><tbody>{body}</tbody>'
            f"</table></div></section></main>{scripts.tags([sorter])}</body></html>\n")


def write_batch_index(sweep_dir: Path, since: float | None = None) -> tuple[Path, Path]:
    """Write batch.csv and batch.html in `sweep_dir` from its job folders; return both paths."""
    sweep_dir = Path(sweep_dir).resolve()
    rows = sort_rows([read_job(j, sweep_dir) for j in find_job_dirs(sweep_dir, since)])
    csv_path, html_path = sweep_dir / CSV_FILE, sweep_dir / HTML_FILE
    write_text(csv_path, batch_csv(rows))
    write_text(html_path, batch_html(rows, sweep_dir))
    failed = sum(r.status == "failed" for r in rows)
    log.info("batch: %d scans (%d failed), index in %s", len(rows), failed, html_path)
    return csv_path, html_path


# ---------------------------------------------------------------------------------------------
# Hydra callback
# ---------------------------------------------------------------------------------------------
def record_failure(job_dir: Path, error: BaseException, config: DictConfig | None = None) -> Path:
    """Write `<job dir>/failed.json`: the message, the error type, the scene and the overrides (and
    the traceback of an error that is not bad input)."""
    from featuretex.errors import InputError

    info: dict[str, Any] = {"status": "failed", "error": str(error) or type(error).__name__,
                            "type": type(error).__name__}
    if config is not None:
        info["scene"] = str(config.get("scene", ""))
        info["overrides"] = [str(o) for o in config.hydra.overrides.task]
    if not isinstance(error, InputError):
        info["traceback"] = "".join(traceback.format_exception(error))
    path = Path(job_dir) / FAILED_FILE
    write_json(path, info)
    return path


class BatchIndex(Callback):
    """Keeps a multirun going past failed scans and writes the batch index at its end."""

    def __init__(self) -> None:
        self.started: float | None = None

    def on_multirun_start(self, config: DictConfig, **kwargs: Any) -> None:
        self.started = time.time()

    def on_job_end(self, config: DictConfig, job_return: JobReturn, **kwargs: Any) -> None:
        if config.hydra.mode != RunMode.MULTIRUN:
            return
        job_dir = Path(config.hydra.runtime.output_dir)
        if job_return.status == JobStatus.FAILED:
            err = job_return._return_value          # the exception (reading .return_value re-raises it)
            record_failure(job_dir, err, config)
            log.error("scan failed, the batch goes on: %s: %s", type(err).__name__, err,
                      exc_info=None if _is_input_error(err) else err)
            # hand the job back as finished: Hydra's sweepers stop the batch at a failed job
            job_return.status = JobStatus.COMPLETED
            job_return.return_value = {"failed": str(err)}
        elif (job_dir / FAILED_FILE).exists():
            (job_dir / FAILED_FILE).unlink()        # an earlier attempt failed, this one did not

    def on_multirun_end(self, config: DictConfig, **kwargs: Any) -> None:
        write_batch_index(Path(config.hydra.sweep.dir), since=self.started)


def _is_input_error(err: BaseException) -> bool:
    from featuretex.errors import InputError

    return isinstance(err, InputError)


def main(argv: list[str] | None = None) -> int:
    args = sys.argv[1:] if argv is None else argv
    if len(args) != 1 or not Path(args[0]).is_dir():
        print("usage: python -m featuretex.batch SWEEP_DIR  (writes batch.csv and batch.html there)",
              file=sys.stderr)
        return 2
    logging.basicConfig(level=logging.INFO, format="%(message)s")
    write_batch_index(Path(args[0]))
    return 0


if __name__ == "__main__":
    sys.exit(main())
