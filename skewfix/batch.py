"""Correct many clips in one go: a folder or a clip list, locally or on a Dask cluster.

    skewfix batch FOLDER_OR_LIST --out DIR [--readout ...] [--workers N] [--scheduler ADDRESS]

A **folder** means every video file directly inside it (by extension, hidden
files skipped); each output gets the input's file name inside ``--out``.

A **clip list** is a plain text file, one clip per line::

    # day 2, B camera; lines starting with # are comments
    A001_C003.mov
    A001_C004.mov  A001_C004_fixed.mov  readout=21.3ms
    "card 2/A002_C001.mp4"  line-order=bottom-up crf=14
    /mnt/plates/sh010.mov  sh010/plate.mov  codec=prores
    B002_C007.mp4  readout=phone-4k30  focal-length=26mm  model=rotation

Each line is ``INPUT [OUTPUT] [setting=value ...]``, split like a shell line
(quote a path that holds spaces). A relative INPUT is relative to the list's
own folder; a relative OUTPUT is relative to ``--out``; without OUTPUT the clip
keeps its file name inside ``--out``. The settings are the ``fix`` options of
the same name: ``readout``, ``line-order``, ``reference-line``, ``border``,
``codec``, ``crf``, ``preset``, ``model``, ``hfov``, ``focal-length`` and
``lens-distortion``; on the command line they are the defaults for every
clip, on a line they override them for that clip (a line's ``hfov`` or
``focal-length`` replaces the other one given on the command line, as the
two are one lens). A word that looks
like ``name=value`` is read as a setting; write ``./a=b.mov`` for a file whose
name has an ``=`` in it. Mistakes in the list stop the batch before any clip
starts, with the line number.

**Reruns.** After each clip is complete, a line is appended to the ledger
``.skewfix-batch-ledger.jsonl`` in ``--out`` (the input's size and
modification time, the settings, the output's size). A rerun skips a clip whose
ledger entry still matches all of these; anything else is corrected again. An
output that exists but that the batch did not write is left alone and reported
as failed, unless ``--force``. Outputs are written under a temporary name and
renamed when whole (as ``fix`` does), so a stopped batch leaves no half file
under a final name.

**Where it runs.** Locally, clips go to a pool of ``--workers`` processes.
With ``--scheduler ADDRESS`` each clip becomes one task on an existing Dask
distributed cluster (``pip install 'skewfix[cluster]'``); the workers must
have skewfix installed and see the same paths. A clip that fails is reported
with its one-line error and the others carry on.
"""

from __future__ import annotations

import json
import os
import shlex
import time
import uuid
from dataclasses import dataclass, field
from pathlib import Path
from typing import Callable, Iterable, Iterator

from skewfix.errors import InputError, RuntimeProblem, SkewfixError, UsageProblem
from skewfix.sequence import is_pattern

VIDEO_SUFFIXES = frozenset({
    ".mov", ".mp4", ".m4v", ".mkv", ".mxf", ".avi", ".mts", ".m2ts", ".ts", ".webm", ".mpg", ".mpeg",
})
SETTINGS = ("readout", "line-order", "reference-line", "border", "codec", "crf", "preset", "model", "hfov",
            "focal-length", "lens-distortion")
LENS_SETTINGS = ("hfov", "focal-length", "lens-distortion")  # parse_lens's three arguments, in order
FOCAL_SETTINGS = ("hfov", "focal-length")  # two ways of giving one focal length
LEDGER_NAME = ".skewfix-batch-ledger.jsonl"
SCHEDULER_TIMEOUT_S = 10
MESSAGE_LIMIT = 300


@dataclass
class ClipJob:
    """One clip to correct: absolute paths and its own settings (setting name -> text)."""

    name: str
    input: str
    output: str
    settings: dict[str, str] = field(default_factory=dict)
    line: int | None = None


@dataclass
class ClipOutcome:
    """What became of one clip; ``status`` is done, skipped or failed."""

    name: str
    output: str
    status: str
    frames: int | None = None
    seconds: float | None = None
    message: str = ""
    input_size: int | None = None
    input_mtime_ns: int | None = None
    output_size: int | None = None
    notes: list[str] = field(default_factory=list)  # what fix says about the clip: the readout's origin, notes


# -- reading the job list ------------------------------------------------------

def check_setting(name: str, value: str, where: str) -> str:
    """The setting's value, normalised, or a `UsageProblem` saying ``where`` it went wrong."""
    from skewfix.encode import CODECS
    from skewfix.models.choice import MODELS
    from skewfix.rowclock import LINE_ORDERS, REFERENCE_LINES
    from skewfix.warp import BORDERS

    allowed = {"line-order": LINE_ORDERS, "reference-line": REFERENCE_LINES, "border": BORDERS,
               "codec": tuple(CODECS), "model": MODELS}
    value = value.strip()
    if name == "codec":
        value = value.lower()
    if name in allowed and value not in allowed[name]:
        raise UsageProblem(f"{where}: {name} must be one of {', '.join(allowed[name])}, not {value!r}")
    if name == "crf" and not (value.isdigit() and 0 <= int(value) <= 51):
        raise UsageProblem(f"{where}: crf must be a whole number from 0 to 51, not {value!r}")
    if name == "preset" and not value.isalnum():
        raise UsageProblem(f"{where}: preset must be one word such as veryfast or medium, not {value!r}")
    if name in LENS_SETTINGS:
        lens_from_settings({name: value}, where)
    if name == "readout":
        from skewfix.cameras import readout_plan

        try:
            readout_plan(value, None)
        except SkewfixError as exc:
            raise UsageProblem(f"{where}: {exc}") from None
        except ImportError as exc:
            raise UsageProblem(f"{where}: readout {value!r} cannot be used in this installation ({exc})") from None
    return value


def lens_from_settings(settings: dict[str, str], where: str):
    """The lens settings of one clip as a `skewfix.models.choice.LensSpec` (None when it has
    none); a `UsageProblem` saying ``where`` and naming the setting otherwise."""
    from skewfix.models.choice import parse_lens

    values = [settings.get(name) for name in LENS_SETTINGS]
    if all(v is None for v in values):
        return None
    try:
        return parse_lens(*values)
    except UsageProblem as exc:
        text = str(exc)
        for name in LENS_SETTINGS:
            text = text.replace(f"--{name}", name)
        raise UsageProblem(f"{where}: {text}") from None


def split_line(text: str, where: str) -> tuple[list[str], dict[str, str]]:
    """One clip-list line -> (paths, settings)."""
    try:
        words = shlex.split(text)
    except ValueError as exc:
        raise UsageProblem(f"{where}: {exc} (check the quotes)") from None
    paths, settings = [], {}
    for word in words:
        name, eq, value = word.partition("=")
        if eq and name.replace("-", "").isalpha():
            if name not in SETTINGS:
                raise UsageProblem(f"{where}: unknown setting {name!r} (known: {', '.join(SETTINGS)})")
            if name in settings:
                raise UsageProblem(f"{where}: {name} is given twice")
            settings[name] = check_setting(name, value, where)
        elif settings:
            last = next(reversed(settings))
            raise UsageProblem(f"{where}: {word!r} follows {last}=...; INPUT and OUTPUT come first, "
                               "and a value with a space needs quotes")
        else:
            paths.append(word)
    if len(paths) > 2:
        raise UsageProblem(f"{where}: expected INPUT [OUTPUT] [setting=value ...], found {len(paths)} paths "
                           "(quote a path that holds spaces)")
    return paths, settings


def _output_for(input_path: str, output: str | None, out_dir: Path) -> str:
    if output is None:
        return str(out_dir / Path(input_path).name)
    target = out_dir / Path(output).expanduser()
    if output.endswith(("/", os.sep)) or target.is_dir():
        target = target / Path(input_path).name
    return os.path.abspath(target)


def read_clip_list(path: Path, out_dir: Path) -> list[ClipJob]:
    """Parse a clip list (format in the module docstring)."""
    try:
        text = path.read_text(encoding="utf-8-sig")
    except UnicodeDecodeError:
        hint = " (for one clip use 'skewfix fix')" if path.suffix.lower() in VIDEO_SUFFIXES else ""
        raise InputError(f"{path}: not a text clip list{hint}") from None
    except OSError as exc:
        raise InputError(f"{path}: cannot be read ({exc.strerror or exc})") from None
    base = path.parent
    jobs = []
    for number, raw in enumerate(text.splitlines(), start=1):
        if not raw.strip() or raw.lstrip().startswith("#"):
            continue
        where = f"{path}, line {number}"
        paths, settings = split_line(raw, where)
        if not paths:
            raise UsageProblem(f"{where}: no INPUT before the settings")
        source = paths[0]
        if is_pattern(source):
            raise UsageProblem(f"{where}: image sequences are not handled by batch yet; use 'skewfix fix' for {source}")
        input_path = os.path.abspath(base / Path(source).expanduser())
        output = _output_for(input_path, paths[1] if len(paths) > 1 else None, out_dir)
        jobs.append(ClipJob(source, input_path, output, settings, number))
    if not jobs:
        raise InputError(f"{path}: lists no clips")
    return jobs


def folder_jobs(folder: Path, out_dir: Path) -> list[ClipJob]:
    """Every video file directly inside ``folder``, each written under its own name in ``out_dir``."""
    if folder.resolve() == out_dir.resolve():
        raise UsageProblem(f"--out {out_dir} is the input folder; outputs would replace the inputs")
    names = sorted(p.name for p in folder.iterdir()
                   if p.is_file() and not p.name.startswith(".") and p.suffix.lower() in VIDEO_SUFFIXES)
    if not names:
        raise InputError(f"{folder}: holds no video files ({', '.join(sorted(VIDEO_SUFFIXES))})")
    return [ClipJob(name, os.path.abspath(folder / name), os.path.abspath(out_dir / name)) for name in names]


def collect_jobs(source: str, out_dir: Path, defaults: dict[str, str]) -> list[ClipJob]:
    """Jobs from a folder or a clip list, with the command-line ``defaults`` filled in."""
    where = Path(source)
    if not where.exists():
        raise InputError(f"{source}: no such folder or clip list")
    defaults = {name: check_setting(name, value, f"--{name}") for name, value in defaults.items()
                if value is not None}
    if any(name in defaults for name in LENS_SETTINGS):
        from skewfix.models.choice import parse_lens

        parse_lens(*(defaults.get(name) for name in LENS_SETTINGS))  # the command line's lens, its option names
    jobs = folder_jobs(where, out_dir) if where.is_dir() else read_clip_list(where, out_dir)
    seen: dict[str, ClipJob] = {}
    for job in jobs:
        inherited = defaults
        if any(name in job.settings for name in FOCAL_SETTINGS):  # the line gives the focal length its way
            inherited = {k: v for k, v in defaults.items() if k not in FOCAL_SETTINGS}
        job.settings = {**inherited, **job.settings}
        place = f"{source}, line {job.line}" if job.line else job.name
        lens_from_settings(job.settings, place)
        if "readout" not in job.settings:
            raise UsageProblem(f"{place}: no readout (give --readout, or readout=... on the line)")
        if job.output in seen:
            raise UsageProblem(f"{place}: writes {job.output}, as does {seen[job.output].name}")
        seen[job.output] = job
    return jobs


# -- the ledger of finished clips ------------------------------------------------

def input_stamp(path: str) -> tuple[int, int]:
    """(size in bytes, modification time in ns) of a file."""
    st = os.stat(path)
    return st.st_size, st.st_mtime_ns


class Ledger:
    """Append-only record of completed outputs, one JSON object a line; the last entry wins."""

    def __init__(self, out_dir: Path):
        self.path = out_dir / LEDGER_NAME
        self.entries: dict[str, dict] = {}
        if self.path.exists():
            for line in self.path.read_text(encoding="utf-8", errors="replace").splitlines():
                try:
                    entry = json.loads(line)
                    self.entries[entry["output"]] = entry
                except (ValueError, KeyError, TypeError):
                    continue  # a line cut short by a crash

    def still_complete(self, job: ClipJob) -> dict | None:
        """The entry for ``job`` if its output is complete for this input and these settings."""
        entry = self.entries.get(job.output)
        if entry is None or entry.get("input") != job.input or entry.get("settings") != job.settings:
            return None
        try:
            size, mtime = input_stamp(job.input)
            out_size = os.path.getsize(job.output)
        except OSError:
            return None
        if (size, mtime, out_size) != (entry.get("input_size"), entry.get("input_mtime_ns"), entry.get("output_size")):
            return None
        return entry

    def wrote(self, output: str) -> bool:
        return output in self.entries

    def record(self, job: ClipJob, outcome: ClipOutcome) -> None:
        entry = dict(output=job.output, input=job.input, settings=job.settings, frames=outcome.frames,
                     input_size=outcome.input_size, input_mtime_ns=outcome.input_mtime_ns,
                     output_size=outcome.output_size, finished=time.strftime("%Y-%m-%dT%H:%M:%S"))
        with open(self.path, "a", encoding="utf-8") as fh:
            fh.write(json.dumps(entry) + "\n")
            fh.flush()
            os.fsync(fh.fileno())
        self.entries[job.output] = entry


# -- one clip (runs in a worker process or on a Dask worker) ------------------------

def _one_line(text: str) -> str:
    first = text.strip().splitlines()[0] if text.strip() else ""
    return first if len(first) <= MESSAGE_LIMIT else first[: MESSAGE_LIMIT - 3] + "..."


def run_clip(job: ClipJob, replace: bool = False) -> ClipOutcome:
    """Correct one clip; every problem becomes a failed outcome with a one-line message."""
    start = time.perf_counter()
    try:
        from skewfix.cameras import plan_readout
        from skewfix.pipeline import FixOptions, fix_clip

        s = job.settings
        plan = plan_readout(s["readout"], s.get("line-order"), lens_from_settings(s, job.name))
        options = FixOptions(readout=plan.seconds or 0.0, readout_origin=plan.origin, line_order=plan.line_order,
                             reference_line=s.get("reference-line", "middle"), border=s.get("border", "edge"),
                             codec=s.get("codec"), crf=int(s["crf"]) if "crf" in s else None,
                             preset=s.get("preset"), force=replace, model=s.get("model", "auto"), lens=plan.lens)
        size, mtime = input_stamp(job.input) if os.path.isfile(job.input) else (None, None)
        result = fix_clip(job.input, job.output, options, readout_resolver=plan.resolver)
    except SkewfixError as exc:
        return ClipOutcome(job.name, job.output, "failed", seconds=time.perf_counter() - start,
                           message=_one_line(str(exc)))
    except Exception as exc:  # noqa: BLE001 - one clip's surprise must not stop the batch
        return ClipOutcome(job.name, job.output, "failed", seconds=time.perf_counter() - start,
                           message=_one_line(f"unexpected {type(exc).__name__}: {exc}"))
    message = "; ".join([f"readout {result.readout * 1e3:.3f} ms ({result.line_order})"] + result.notes)
    said = f"readout {result.readout * 1e3:.3f} ms ({result.line_order}, {result.readout_origin})"  # as fix says it
    return ClipOutcome(job.name, job.output, "done", result.frames_written, time.perf_counter() - start,
                       _one_line(message), size, mtime, os.path.getsize(job.output), notes=[said, *result.notes])


def _crashed(job: ClipJob, exc: BaseException) -> ClipOutcome:
    return ClipOutcome(job.name, job.output, "failed",
                       message=_one_line(f"the worker running this clip stopped ({type(exc).__name__}: {exc})"))


# -- where the clips run ----------------------------------------------------------

Task = tuple[ClipJob, bool]  # the job and whether it may replace an earlier output


def run_local(tasks: list[Task], workers: int) -> Iterator[tuple[ClipJob, ClipOutcome]]:
    """Run the clips in a pool of fresh worker processes, yielding outcomes as they finish."""
    import multiprocessing
    from concurrent.futures import ProcessPoolExecutor, as_completed

    # "spawn": workers start clean, never inheriting the parent's codec or OpenCV threads.
    pool = ProcessPoolExecutor(max_workers=max(1, min(workers, len(tasks))),
                               mp_context=multiprocessing.get_context("spawn"))
    try:
        futures = {pool.submit(run_clip, job, replace): job for job, replace in tasks}
        for future in as_completed(futures):
            job = futures[future]
            try:
                yield job, future.result()
            except Exception as exc:  # noqa: BLE001 - a dead worker process
                yield job, _crashed(job, exc)
    finally:
        pool.shutdown(wait=True, cancel_futures=True)


def require_distributed():
    """The `distributed` package, or a one-line install hint."""
    try:
        import distributed
    except ImportError:
        raise UsageProblem("--scheduler needs Dask distributed, which is not installed "
                           "(pip install 'skewfix[cluster]')") from None
    return distributed


def connect(address: str):
    """A `distributed.Client` for the scheduler at ``address``, or a one-line error."""
    distributed = require_distributed()
    from distributed.comm import resolve_address

    try:  # checked first: a Client built on a bad address hangs for its close timeout at exit
        resolve_address(address)
    except (ValueError, OSError) as exc:
        raise UsageProblem(f"--scheduler {address!r} is not a usable address ({_one_line(str(exc))}; "
                           "expected e.g. tcp://10.0.0.5:8786)") from None
    Client = distributed.Client
    try:
        return Client(address, timeout=SCHEDULER_TIMEOUT_S, set_as_default=False)
    except Exception as exc:  # noqa: BLE001 - any failure to connect is one line for the user
        raise RuntimeProblem(f"cannot reach the Dask scheduler at {address} "
                             f"({_one_line(str(exc)) or type(exc).__name__})") from None


def run_on_cluster(tasks: list[Task], address: str) -> Iterator[tuple[ClipJob, ClipOutcome]]:
    """Submit one Dask task per clip to the cluster at ``address``; yield outcomes as they finish."""
    from distributed import as_completed

    client = connect(address)
    run_id = uuid.uuid4().hex[:8]
    try:
        futures = {client.submit(run_clip, job, replace, key=f"skewfix-clip-{run_id}-{i}", pure=False): job
                   for i, (job, replace) in enumerate(tasks)}
        for future in as_completed(list(futures), loop=client.loop):
            job = futures[future]
            try:
                yield job, future.result()
            except Exception as exc:  # noqa: BLE001 - a lost worker, a cancelled task
                yield job, _crashed(job, exc)
            future.release()
    finally:
        client.close()


# -- the whole batch ------------------------------------------------------------------

def plan(jobs: Iterable[ClipJob], ledger: Ledger, force: bool) -> tuple[list[Task], list[tuple[ClipJob, ClipOutcome]]]:
    """Split jobs into tasks to run and outcomes known already (skipped, or refused)."""
    tasks, settled = [], []
    for job in jobs:
        entry = ledger.still_complete(job)
        if entry is not None and not force:
            settled.append((job, ClipOutcome(job.name, job.output, "skipped", entry.get("frames"),
                                             message="complete from an earlier run")))
        elif os.path.exists(job.output) and not (force or ledger.wrote(job.output)):
            settled.append((job, ClipOutcome(job.name, job.output, "failed", message=(
                f"{job.output}: already exists and was not written by skewfix batch (add --force to replace it)"))))
        else:
            tasks.append((job, os.path.exists(job.output)))
    return tasks, settled


def run_batch(source: str, out_dir: str, defaults: dict[str, str] | None = None, workers: int = 1,
              scheduler: str | None = None, force: bool = False,
              on_outcome: Callable[[ClipOutcome], None] | None = None) -> list[ClipOutcome]:
    """Correct every clip of a folder or clip list; returns the outcomes in list order."""
    out = Path(out_dir)
    if out.exists() and not out.is_dir():
        raise UsageProblem(f"--out {out_dir} is a file; give a folder")
    jobs = collect_jobs(source, out.absolute(), defaults or {})
    if scheduler is not None:
        require_distributed()  # before any folder is made
    out.mkdir(parents=True, exist_ok=True)
    for job in jobs:
        Path(job.output).parent.mkdir(parents=True, exist_ok=True)
    ledger = Ledger(out.absolute())
    tasks, settled = plan(jobs, ledger, force)
    outcomes: dict[str, ClipOutcome] = {}  # by output, which is unique
    report = on_outcome or (lambda outcome: None)
    for job, outcome in settled:
        outcomes[job.output] = outcome
        report(outcome)
    if tasks:
        runner = run_on_cluster(tasks, scheduler) if scheduler else run_local(tasks, workers)
        for job, outcome in runner:
            if outcome.status == "done":
                ledger.record(job, outcome)
            outcomes[job.output] = outcome
            report(outcome)
    return [outcomes[job.output] for job in jobs]
