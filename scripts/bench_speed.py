"""Speed and memory of `fix` against a plain transcode, side by side.

Renders rolling-shutter whip pans with skewfix.synth (cached in scripts/.cache),
then, in one run and alternating, times `fix` and a plain PyAV decode-and-encode
of the same clip with the same encoder settings, each in a fresh child process
that reports its wall time, CPU time and peak resident memory (Linux VmHWM; a
child's ru_maxrss is no good here, as Linux carries the parent's high-water
mark across fork and exec). Prints one table:
the fix/plain ratio for 1080p25 H.264, 4K H.264 and a 10-bit 4:2:2 ProRes
source, the time in each stage of fix, the peak memory of fix on a clip and on
one four times longer, and the time of `skewfix measure --method flicker`.

    python scripts/bench_speed.py [--quick] [--repeats N] [--profile]
    python scripts/bench_speed.py --costs
    python scripts/bench_speed.py --against REV [--repeats N]
    python scripts/bench_speed.py --threads [--repeats N]
    python scripts/bench_speed.py --floor [--quick] [--repeats N]
    python scripts/bench_speed.py --limit [--repeats N]

``--costs`` instead times each stage alone on one thread at 1080p and prints
the ratio those costs allow at best (every core busy in both jobs).
``--against REV`` runs this tree's fix and a git revision's side by side with
the plain transcode (mean of N alternating rounds): the fair way to see what a
change did on a noisy machine.
``--floor`` compares fix with what the job cannot avoid: decoding the source and
encoding fix's own corrected pictures at the same settings (the pictures made
once, decoded into memory untimed, picture types cleared); wall and CPU, the
best of N alternating rounds, the load beside each figure.
``--limit`` runs the floor, the bare stages (decode, proxy, phase seed, Lucas-Kanade both
ways, strip-wise warpAffine, encode, written with OpenCV and PyAV alone), the same without
the tracking ("warp only") and fix, linear and cubic, alternating: a bound on the ratio any
fix built from those stages can reach (a loose one on two cores: see DEVELOPERS.md).
``--threads`` runs plain and fix on the 1080p clip while sampling the CPU time
of every thread of the child (/proc/PID/task), and prints CPU seconds per
thread: where the cores go when everything runs at once.

Times are the smallest of the repeats (the least disturbed run); only ratios
measured in the same run are comparable. ``--profile`` adds a cProfile of one
1080p fix, every thread profiled on its own, as a breakdown of where the time
goes.
"""

from __future__ import annotations

import argparse
import json
import os
import platform
import subprocess
import sys
import tempfile
import time
from dataclasses import dataclass
from fractions import Fraction
from pathlib import Path

CACHE = Path(__file__).resolve().parent / ".cache"
CACHE_VERSION = 1  # bump when the rendered clips change
ENCODE = {"h264": ("libx264", {"crf": "18", "preset": "veryfast"}), "prores": ("prores_ks", {"profile": "3"})}
RATE = Fraction(25)


@dataclass(frozen=True)
class ClipSpec:
    """A rendered test clip: a whip pan (or a still-pan-still take) at a known readout."""

    label: str
    width: int
    height: int
    frames: int
    readout: float
    codec: str = "h264"          # key of ENCODE: the source's codec and the one fix writes
    pan_frames: int | None = None  # frames the whip pan lasts, centred; default 80 % of the clip
    interpolation: str = "cubic"   # fix --interpolation (the clip file does not depend on it)

    @property
    def file(self) -> Path:
        kind = "prores.mov" if self.codec == "prores" else "h264.mp4"
        pan = self.pan_frames or 0
        return CACHE / f"v{CACHE_VERSION}_{self.width}x{self.height}_{self.frames}f_{pan}p_{kind}"

    def camera(self):
        from skewfix.synth.paths import WhipPan

        pan = self.pan_frames or round(0.8 * self.frames)
        speed = 168.0 * self.width / 1920 * float(RATE)  # 168 px a frame at 1080p (a fast whip pan)
        return WhipPan(peak_px_s=speed, centre_s=self.frames / 2 / float(RATE), duration_s=pan / float(RATE),
                       tilt_px_s=8.0 * self.height / 1080)

    def render(self) -> Path:
        """Render once; later runs reuse the cached file."""
        from skewfix.synth.scenes import harbour_scene
        from skewfix.synth.shutter import render_clip

        if self.file.exists():
            return self.file
        CACHE.mkdir(exist_ok=True)
        (CACHE / ".gitignore").write_text("*\n")  # the cache keeps itself out of git
        camera = self.camera()
        travel = float(camera.curves(self.frames / float(RATE))[0])
        margin = self.width // 10
        scene = harbour_scene(int(self.height * 1.3), int(travel + self.width + 3 * margin))
        tmp = self.file.with_name(".partial_" + self.file.name)
        encoder = ENCODE[self.codec][0]
        pix_fmt = "yuv422p10le" if self.codec == "prores" else "yuv420p"
        print(f"rendering {self.label}, {self.frames} frames -> {self.file.name} (cached) ...", file=sys.stderr)
        render_clip(tmp, scene, camera, self.width, self.height, RATE, self.frames, self.readout,
                    origin=(margin, self.height * 0.15), crf=14, codec=encoder, pix_fmt=pix_fmt)
        os.replace(tmp, self.file)
        return self.file


def clip_specs(quick: bool) -> dict[str, ClipSpec]:
    n, n4k = (20, 6) if quick else (60, 24)
    return {
        "1080": ClipSpec("1080p25 H.264", 1920, 1080, n, 0.020),
        "1080long": ClipSpec("1080p25 H.264, 4x longer", 1920, 1080, 4 * n, 0.020, pan_frames=round(0.8 * n)),
        "1080lin": ClipSpec("1080p25 H.264, --interpolation linear", 1920, 1080, n, 0.020, interpolation="linear"),
        "4k": ClipSpec("2160p25 H.264 (3840x2160)", 3840, 2160, n4k, 0.028),
        "prores": ClipSpec("1080p25 ProRes 422 HQ 10-bit", 1920, 1080, n, 0.020, codec="prores"),
    }


# -- the two jobs, each run in a child process ----------------------------------------

def encoder_like(out, video, codec: str):
    """An output video stream of ``out`` with ``video``'s size, pixel format and time base,
    and fix's encoder settings for ``codec``."""
    encoder, options = ENCODE[codec]
    stream = out.add_stream(encoder, rate=video.average_rate)
    stream.width, stream.height = video.codec_context.width, video.codec_context.height
    stream.pix_fmt = video.codec_context.pix_fmt
    stream.codec_context.time_base = video.time_base
    stream.options = dict(options)
    return stream


def plain_transcode(source: str, target: str, codec: str, pictures: list | None = None) -> int:
    """Decode every frame and encode it again with the same encoder settings as fix; returns frames.

    ``pictures``: frames already in memory to encode instead of the decoded ones (the floor job):
    the source is still decoded in full, and each picture takes its decoded frame's timestamp.
    Every encoded frame has its picture type cleared, so the encoder chooses its own frame types
    as it does in fix (a frame decoded from an intra-only codec such as FFV1 or ProRes says "I",
    and libx264 obeys: every frame became a keyframe).
    """
    import av
    from av.video.frame import PictureType

    with av.open(source) as inp, av.open(target, "w") as out:
        video = inp.streams.video[0]
        video.thread_type = "SLICE"  # as skewfix's decoder does (skewfix.decode: slice threads only)
        stream = encoder_like(out, video, codec)
        frames = 0
        for frame in inp.decode(video):
            picture = frame if pictures is None else pictures[frames]
            picture.pts, picture.time_base = frame.pts, frame.time_base
            picture.pict_type = PictureType.NONE
            for packet in stream.encode(picture):
                out.mux(packet)
            frames += 1
        for packet in stream.encode():
            out.mux(packet)
    return frames


def floor_job(source: str, pictures_file: str, target: str, codec: str) -> dict:
    """The floor: decode ``source`` and encode fix's corrected pictures with fix's encoder settings.

    The pictures (fix's output, written once losslessly) are decoded into memory first, untimed;
    the reported times start after that.
    """
    import av

    with av.open(pictures_file) as c:
        pictures = list(c.decode(video=0))
    start, cpu = time.perf_counter(), time.process_time()
    frames = plain_transcode(source, target, codec, pictures)
    return {"frames": frames, "seconds": time.perf_counter() - start, "cpu_s": time.process_time() - cpu}


def bare_job(source: str, target: str, codec: str, interpolation: str, track: bool = True) -> dict:
    """The stages no correction can skip, written with OpenCV and PyAV alone (no skewfix code).

    Per frame: decode (slice threads, as fix's decoder), a 960 px proxy, a phase-correlation
    seed at half that size, pyramidal Lucas-Kanade forward and back (15 px window, 3 levels)
    from 288 points on a fixed grid (no corner search), then every plane warped strip by strip
    with cv2.warpAffine (a fixed shear per 32-row strip, as a whip pan's correction makes;
    the chosen interpolation for luma, cubic through float32 buffers made once, bilinear for
    subsampled chroma, as fix does) and encoded with fix's settings. No corner search, fit or
    map, and no threads of its own: a lower bound
    on any fix built from these stages, timed like the floor (from after the imports).
    ``track=False`` leaves out the proxy and the tracking: only the resampling every
    correction must do, between decode and encode.
    """
    import av
    import cv2
    import numpy as np

    cv2.setNumThreads(1)
    flag = {"linear": cv2.INTER_LINEAR, "cubic": cv2.INTER_CUBIC}[interpolation]
    gx, gy = np.meshgrid(np.linspace(40, 920, 18), np.linspace(30, 500, 16))
    pts = np.float32(np.stack([gx.ravel(), gy.ravel()], 1)).reshape(-1, 1, 2)  # 288 points
    start, cpu = time.perf_counter(), time.process_time()
    frames, previous = 0, None
    floats = {}  # float32 source and result of the cubic luma, made once (fix pools them)
    with av.open(source) as inp, av.open(target, "w") as out:
        video = inp.streams.video[0]
        video.thread_type = "SLICE"
        stream = encoder_like(out, video, codec)
        for frame in inp.decode(video):
            planes = [np.frombuffer(p, np.uint8 if p.line_size < 2 * p.width else np.uint16)
                      .reshape(p.height, -1)[:, :p.width] for p in frame.planes]
            luma = planes[0] if planes[0].dtype == np.uint8 else (planes[0] >> 2).astype(np.uint8)
            scale = 960 / max(luma.shape)
            proxy = cv2.resize(luma, None, fx=scale, fy=scale, interpolation=cv2.INTER_AREA)
            if previous is not None and track:
                half = [np.float32(cv2.resize(p, None, fx=0.5, fy=0.5, interpolation=cv2.INTER_AREA))
                        for p in (previous, proxy)]
                (dx, dy), _ = cv2.phaseCorrelate(*half)
                guess = pts + 2 * np.float32([dx, dy])
                lk = dict(winSize=(15, 15), maxLevel=3, flags=cv2.OPTFLOW_USE_INITIAL_FLOW,
                          criteria=(cv2.TERM_CRITERIA_EPS | cv2.TERM_CRITERIA_COUNT, 20, 0.01))
                fwd, _, _ = cv2.calcOpticalFlowPyrLK(previous, proxy, pts, guess, **lk)
                cv2.calcOpticalFlowPyrLK(proxy, previous, fwd, pts.copy(), **lk)
            previous = proxy
            picture = av.VideoFrame(frame.width, frame.height, frame.format.name)
            for index, (src, dst) in enumerate(zip(planes, picture.planes)):
                plane_flag = flag if index == 0 else cv2.INTER_LINEAR
                view = np.frombuffer(dst, src.dtype).reshape(dst.height, -1)[:, :dst.width]
                # cubic is faster on float32 with the same result, as fix does it
                wide = plane_flag == cv2.INTER_CUBIC
                work, into = src, view
                if wide:
                    if src.shape not in floats:
                        floats[src.shape] = (np.empty(src.shape, np.float32), np.empty(src.shape, np.float32))
                    work, into = floats[src.shape]
                    np.copyto(work, src)
                strip = 32 * src.shape[0] // frame.height
                for r0 in range(0, src.shape[0], strip):
                    rows = min(strip, src.shape[0] - r0)
                    shear = np.float64([[1.0, 0.01, 0.3 + 0.01 * r0], [0.0, 1.0, r0 + 0.2]])
                    cv2.warpAffine(work, shear, (src.shape[1], rows), dst=into[r0:r0 + rows],
                                   flags=plane_flag | cv2.WARP_INVERSE_MAP, borderMode=cv2.BORDER_REPLICATE)
                if wide:
                    cv2.add(into, 0.0, dst=view, dtype=cv2.CV_8U if src.dtype == np.uint8 else cv2.CV_16U)
            picture.pts, picture.time_base = frame.pts, frame.time_base
            for packet in stream.encode(picture):
                out.mux(packet)
            frames += 1
        for packet in stream.encode():
            out.mux(packet)
    return {"frames": frames, "seconds": time.perf_counter() - start, "cpu_s": time.process_time() - cpu}


def fix(source: str, target: str, codec: str, readout: float, interpolation: str = "cubic") -> dict:
    from skewfix.pipeline import FixOptions, fix_clip

    _, options = ENCODE[codec]
    crf = int(options["crf"]) if "crf" in options else None
    result = fix_clip(source, target, FixOptions(readout=readout, codec=codec, crf=crf, preset=options.get("preset"),
                                                 force=True, interpolation=interpolation))
    return {"frames": result.frames_written, "stages": result.times.as_dict()}


def peak_rss_mb() -> float:
    """This process's peak resident set (Linux VmHWM, reset by exec, so not inflated by the parent)."""
    try:
        for line in Path("/proc/self/status").read_text().splitlines():
            if line.startswith("VmHWM:"):
                return int(line.split()[1]) / 1024.0
    except OSError:
        pass
    import resource

    return resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024.0  # may include the parent's


def record_thread_names() -> dict[str, str]:
    """Native thread id -> Python thread name, filled as threads start (for --threads)."""
    import threading

    names = {str(threading.get_native_id()): "main thread"}
    original_run = threading.Thread.run

    def named_run(self):
        names[str(threading.get_native_id())] = self.name
        original_run(self)

    threading.Thread.run = named_run
    return names


def child_main(job: str, *rest: str) -> None:
    """One measured job in this (fresh) process; prints a JSON report as the last line."""
    names = record_thread_names() if os.environ.get("SKEWFIX_BENCH_THREADS") else None
    start, cpu_start = time.perf_counter(), time.process_time()
    expected_tree = os.environ.get("SKEWFIX_BENCH_TREE")
    if expected_tree and job != "plain":  # --against: make sure the other revision's code is the one running
        import skewfix

        if not Path(skewfix.__file__).resolve().is_relative_to(Path(expected_tree).resolve()):
            raise SystemExit(f"skewfix came from {skewfix.__file__}, not from {expected_tree}")
    if job == "plain":
        report = {"frames": plain_transcode(rest[0], rest[1], rest[2])}
    elif job == "floor":
        report = floor_job(rest[0], rest[1], rest[2], rest[3])
    elif job == "fix":
        report = fix(rest[0], rest[1], rest[2], float(rest[3]), rest[4])
    elif job == "bare":
        report = bare_job(rest[0], rest[1], rest[2], rest[4], track=rest[5:6] != ["warp-only"])
    else:  # "cli": the skewfix command line, in process
        from skewfix.cli import main as cli_main

        report = {"exit": cli_main(list(rest))}
    report.setdefault("seconds", time.perf_counter() - start)
    report.setdefault("cpu_s", time.process_time() - cpu_start)  # all threads of this process
    report["peak_mb"] = peak_rss_mb()
    if names is not None:
        report["thread_names"] = names
    print("\n" + json.dumps(report))


def compile_bytecode(tree: Path) -> None:
    """Write the .pyc files of ``tree``'s skewfix package, as installing a wheel does.

    With PYTHONDONTWRITEBYTECODE set (it is on the development machines) nothing ever writes
    them for a source checkout, so every child would compile skewfix's modules again: about
    0.12 s of CPU a run, which an installed copy never pays and the floor's jobs do not have."""
    import compileall

    compileall.compile_dir(str(tree / "skewfix"), quiet=1)


def run_child(args: list[str], tree: Path | None = None) -> tuple[dict, float]:
    """Run a child job; returns (its JSON report, wall seconds of the whole process).

    ``tree``: a checkout whose skewfix the child imports instead of this one's.
    """
    env = None
    if tree is not None:
        env = dict(os.environ, PYTHONPATH=str(tree), SKEWFIX_BENCH_TREE=str(tree))
    with tempfile.TemporaryFile() as err:
        start = time.perf_counter()
        proc = subprocess.run(args, stdout=subprocess.PIPE, stderr=err, env=env)
        wall = time.perf_counter() - start
        err.seek(0)
        lines = err.read().decode(errors="replace").strip().splitlines() or ["(no message)"]
    return child_report(args, proc.returncode, proc.stdout, lines[-1]), wall


def child_report(args: list[str], returncode: int, stdout: bytes, message: str) -> dict:
    """The JSON report a child printed last; raises if the child failed."""
    text = stdout.decode(errors="replace").strip().splitlines()
    report = json.loads(text[-1]) if text and text[-1].startswith("{") else {}
    if returncode != 0 or report.get("exit", 0) != 0:
        raise RuntimeError(f"{' '.join(Path(a).name for a in args[2:])}: exit {returncode}: {message}")
    return report


def job_args(job: str, spec: ClipSpec, target: Path, source: Path | None = None) -> list[str]:
    """A child's command line; ``source`` replaces the clip's own file (same settings)."""
    return [sys.executable, __file__, "--child", job, str(source or spec.file), str(target), spec.codec,
            repr(spec.readout), spec.interpolation]


def cli_args(*words: str) -> list[str]:
    return [sys.executable, __file__, "--child", "cli", *words]


def stream_summary(path: Path) -> str:
    import av

    with av.open(str(path)) as c:
        cc = c.streams.video[0].codec_context
        return f"{cc.name} {cc.profile or ''} {cc.pix_fmt} {cc.width}x{cc.height}".replace("  ", " ")


@dataclass
class Pair:
    """The fastest plain and fix runs of one clip, with their peak memory."""

    spec: ClipSpec
    plain_s: float
    fix_s: float
    plain_cpu: float
    fix_cpu: float
    plain_mb: float
    fix_mb: float
    stages: dict
    same_format: bool

    @property
    def ratio(self) -> float:
        return self.fix_s / self.plain_s


def compare(spec: ClipSpec, repeats: int, work: Path) -> Pair:
    """Alternate plain and fix runs on one clip; keep the fastest of each."""
    spec.render()
    plain_out, fix_out = work / f"plain{spec.file.suffix}", work / f"fix{spec.file.suffix}"
    plains, fixes = [], []
    for _ in range(repeats):
        plains.append(run_child(job_args("plain", spec, plain_out))[0])
        fixes.append(run_child(job_args("fix", spec, fix_out))[0])
    fastest_fix = min(fixes, key=lambda r: r["seconds"])
    same = stream_summary(plain_out) == stream_summary(fix_out)
    return Pair(spec, min(r["seconds"] for r in plains), fastest_fix["seconds"],
                min(r["cpu_s"] for r in plains), min(r["cpu_s"] for r in fixes),
                max(r["peak_mb"] for r in plains), max(r["peak_mb"] for r in fixes), fastest_fix["stages"], same)


# -- the flicker measurement --------------------------------------------------------

def flicker_row(work: Path) -> str:
    """`skewfix measure --method flicker --light-hz 100` on 24 frames of 1080p25, as a user runs it."""
    from importlib.util import find_spec

    if find_spec("skewfix.cli.measure") is None or find_spec("skewfix.synth.flicker") is None:
        return "n/a (no measure command or flicker renderer yet)"
    from skewfix.synth.flicker import render_flicker_clip

    clip = CACHE / f"v{CACHE_VERSION}_flicker_1920x1080_24f.mp4"
    if not clip.exists():
        CACHE.mkdir(exist_ok=True)
        tmp = clip.with_name(".partial_" + clip.name)
        render_flicker_clip(tmp, 1920, 1080, RATE, 24, 0.020, 100.0)
        os.replace(tmp, clip)
    _, startup = run_child(cli_args("--help"))
    try:
        report, wall = run_child(cli_args("measure", str(clip), "--method", "flicker", "--light-hz", "100"))
    except RuntimeError as exc:
        return f"failed: {exc}"
    return (f"{wall:.2f} s for the whole process ({verdict(wall, 5.0)}, target < 5 s), of which the command "
            f"itself {report['seconds']:.2f} s; start-up alone (skewfix --help) {startup:.2f} s; "
            f"peak {report['peak_mb']:.0f} MB")


# -- the table -----------------------------------------------------------------------

def verdict(value: float, limit: float) -> str:
    return "ok" if value <= limit else "MISS"


def print_table(pairs: dict[str, Pair], flicker: str, repeats: int, loads: list[float], quick: bool) -> None:
    import av
    import cv2

    print(f"skewfix bench_speed: Python {platform.python_version()}, {os.cpu_count()} cores, PyAV {av.__version__}, "
          f"OpenCV {cv2.__version__}; fastest of {repeats} alternating run(s) each, every run a fresh process")
    print(f"machine load (1-minute average) at start and end: {loads[0]:.1f}, {loads[1]:.1f}"
          + ("  -- other work was running: trust the ratios, not the seconds" if max(loads) > 1.5 else ""))
    print()
    print("speed: fix against a plain PyAV decode+encode, same encoder settings "
          "(H.264: libx264 crf 18 veryfast; ProRes: prores_ks HQ)")
    print("(wall: elapsed time of the job; CPU: user+system time of all its threads, less disturbed by other load)")
    head = (f"{'clip':34} {'frames':>6} {'plain s':>8} {'fix s':>8} {'fix/plain':>9}  {'target':>7}  {'':4} "
            f"{'fix fps':>7} {'plain CPU':>9} {'fix CPU':>8} {'CPU ratio':>9}")
    print(head)
    print("-" * len(head))
    for key in ("1080", "1080lin", "4k", "prores"):
        p = pairs[key]
        mark = "" if p.same_format else "  (outputs differ in format!)"
        print(f"{p.spec.label:34} {p.spec.frames:6d} {p.plain_s:8.2f} {p.fix_s:8.2f} {p.ratio:8.2f}x  "
              f"{'<=1.25x':>7}  {verdict(p.ratio, 1.25):4} {p.spec.frames / p.fix_s:7.1f} {p.plain_cpu:9.2f} "
              f"{p.fix_cpu:8.2f} {p.fix_cpu / p.plain_cpu:8.2f}x{mark}")
    print()
    print("stages of fix (FixResult.times), seconds in each; the stages run on overlapping threads, so they "
          "need not add up to the total; remap includes computing the maps")
    names = ("decode", "track", "fit", "remap", "encode")
    head = f"{'clip':34} " + " ".join(f"{n:>7}" for n in names) + f" {'total':>7}   per frame: remap  encode"
    print(head)
    print("-" * len(head))
    for key in ("1080", "4k", "prores", "1080long"):
        p = pairs[key]
        per = {n: 1e3 * p.stages[n] / p.spec.frames for n in ("remap", "encode")}
        print(f"{p.spec.label:34} " + " ".join(f"{p.stages[n]:7.2f}" for n in names) + f" {p.fix_s:7.2f}"
              f"   {per['remap']:13.1f} ms {per['encode']:5.1f} ms")
    print()
    short, long = pairs["1080"], pairs["1080long"]
    growth = long.fix_mb / short.fix_mb
    print("memory: peak resident set of the whole child process (Linux VmHWM)")
    head = f"{'clip':34} {'frames':>6} {'fix MB':>8} {'plain MB':>9}  {'target':>20}"
    print(head)
    print("-" * len(head))
    print(f"{short.spec.label:34} {short.spec.frames:6d} {short.fix_mb:8.0f} {short.plain_mb:9.0f}  "
          f"{'<= 450 MB (aim 400)':>20}  {verdict(short.fix_mb, 450)}")
    print(f"{long.spec.label:34} {long.spec.frames:6d} {long.fix_mb:8.0f} {long.plain_mb:9.0f}  "
          f"{'<= 1.10x the short':>20}  {verdict(growth, 1.10)} ({growth:.3f}x)")
    print(f"{'4K fix, for scale':34} {pairs['4k'].spec.frames:6d} {pairs['4k'].fix_mb:8.0f} {pairs['4k'].plain_mb:9.0f}")
    if quick:
        print("(quick run: a clip this short can end before fix's look-ahead fills; judge memory on a full run)")
    print()
    print(f"measure --method flicker --light-hz 100, 24 frames 1080p25: {flicker}")


# -- profile ---------------------------------------------------------------------------

# Where fix spends its time: (label, file, function), each read as cumulative time per thread.
BREAKDOWN = (
    ("decode (demux, decode, plane copies)", "decode.py", "demux"),
    ("track (proxy, features, LK, phase corr.)", "track.py", "push"),
    ("fit the motion splines", "motion.py", "fit_motion"),
    ("warp maps on the coarse grid", "warp.py", "correction_map"),
    ("upsample maps to each plane", "warp.py", "full"),
    ("remap planes (cv2.remap)", "warp.py", "remap_plane"),
    ("planes into an av.VideoFrame", "encode.py", "fill_frame"),
    ("encode and mux", "encode.py", "write_frame"),
    ("flush the encoder, close, rename", "encode.py", "finish"),
    ("open input/output, probe", "encode.py", "__init__"),
    ("wait: queue get", "queue.py", "get"),
    ("wait: queue put", "queue.py", "put"),
)


def cumulative(stats, file: str, func: str) -> float:
    return sum(v[3] for (f, _line, name), v in stats.stats.items() if name == func and Path(f).name == file)


def profile_fix(spec: ClipSpec, work: Path, top: int = 12) -> None:
    """cProfile of one fix with every Python thread profiled on its own (cProfile sees one thread)."""
    import cProfile
    import pstats
    import threading

    from skewfix.pipeline import FixOptions, fix_clip

    spec.render()
    profiles: list[cProfile.Profile] = []
    original_run = threading.Thread.run

    def profiled_run(self):
        prof = cProfile.Profile()
        profiles.append(prof)
        prof.runcall(original_run, self)

    threading.Thread.run = profiled_run
    main_prof = cProfile.Profile()
    _, options = ENCODE[spec.codec]
    try:
        start = time.perf_counter()
        main_prof.runcall(fix_clip, str(spec.file), str(work / "profiled.mp4"),
                          FixOptions(readout=spec.readout, codec=spec.codec, crf=int(options["crf"]),
                                     preset=options["preset"], force=True))
        wall = time.perf_counter() - start
    finally:
        threading.Thread.run = original_run
    print()
    print(f"profile: one fix of {spec.label}, {spec.frames} frames, {wall:.2f} s wall, in-process, cProfile per thread")
    threads = [("main", pstats.Stats(main_prof))] + [(f"thread {i + 1}", pstats.Stats(p))
                                                      for i, p in enumerate(profiles)]
    print(f"  {'thread':9} {'where (cumulative, nested rows overlap)':42} {'s':>7} {'% wall':>7}")
    for name, stats in threads:
        for label, file, func in BREAKDOWN:
            seconds = cumulative(stats, file, func)
            if seconds >= 0.005 * wall:
                print(f"  {name:9} {label:42} {seconds:7.2f} {100 * seconds / wall:6.1f}%")
    merged = pstats.Stats(main_prof)
    for p in profiles:
        merged.add(p)
    print(f"  top {top} functions by own time, all threads together (% of wall; threads overlap):")
    rows = sorted(merged.stats.items(), key=lambda kv: kv[1][2], reverse=True)[:top]
    for (file, line, func), (_cc, calls, own, _cum, _callers) in rows:
        where = func if file == "~" else f"{Path(file).name}:{line} {func}"
        if "acquire" in func and "lock" in func:
            where += "  (threads waiting for each other)"
        print(f"    {100 * own / wall:5.1f}%  {own:6.2f} s  {calls:6d} calls  {where}")


# -- this tree against another revision ------------------------------------------------

def against(rev: str, specs: list[ClipSpec], rounds: int, work: Path) -> None:
    """Plain, fix from this tree and fix from ``rev``, alternating in one run; one table."""
    repo = Path(__file__).resolve().parent.parent
    other = work / "other"
    subprocess.run(["git", "-C", str(repo), "worktree", "add", "--detach", "--quiet", str(other), rev], check=True)
    compile_bytecode(other)
    try:
        print(f"this tree against {rev}, {rounds} alternating rounds, every run a fresh process "
              "(wall and CPU in seconds)")
        head = f"{'clip':34} {'job':10} {'mean wall':>9} {'min wall':>8} {'mean CPU':>8} {'/plain':>7} {'/' + rev[:8]:>9}"
        print(head)
        print("-" * len(head))
        for spec in specs:
            spec.render()
            runs: dict[str, list[dict]] = {"plain": [], "this tree": [], rev[:10]: []}
            for _ in range(rounds):
                runs["plain"].append(run_child(job_args("plain", spec, work / f"p{spec.file.suffix}"))[0])
                runs["this tree"].append(run_child(job_args("fix", spec, work / f"a{spec.file.suffix}"))[0])
                runs[rev[:10]].append(run_child(job_args("fix", spec, work / f"b{spec.file.suffix}"), other)[0])
            mean = {k: sum(r["seconds"] for r in v) / len(v) for k, v in runs.items()}
            for job, reports in runs.items():
                cpu = sum(r["cpu_s"] for r in reports) / len(reports)
                best = min(r["seconds"] for r in reports)
                versus = "" if job == "plain" else f"{mean[job] / mean[rev[:10]]:8.2f}x"
                print(f"{spec.label:34} {job:10} {mean[job]:9.2f} {best:8.2f} {cpu:8.2f} "
                      f"{mean[job] / mean['plain']:6.2f}x {versus:>9}")
    finally:
        subprocess.run(["git", "-C", str(repo), "worktree", "remove", "--force", str(other)], check=False)


# -- CPU per thread ----------------------------------------------------------------------

def sample_threads(args: list[str]) -> tuple[dict, dict[str, float]]:
    """Run a child job, sampling each thread's CPU time; returns (its report, CPU s per thread group)."""
    tick = os.sysconf("SC_CLK_TCK")
    out = tempfile.TemporaryFile()  # not a pipe: a child that prints much cannot block on it
    proc = subprocess.Popen(args, stdout=out, stderr=subprocess.DEVNULL,
                            env=dict(os.environ, SKEWFIX_BENCH_THREADS="1"))
    last: dict[str, tuple[str, int]] = {}  # tid -> (comm, user+system ticks), the last reading
    while proc.poll() is None:
        try:
            tids = os.listdir(f"/proc/{proc.pid}/task")
        except OSError:
            break
        for tid in tids:
            try:
                stat = Path(f"/proc/{proc.pid}/task/{tid}/stat").read_text()
            except OSError:
                continue
            fields = stat[stat.rindex(")") + 2:].split()
            last[tid] = (stat[stat.index("(") + 1:stat.rindex(")")], int(fields[11]) + int(fields[12]))
        time.sleep(0.01)
    with out:
        out.seek(0)
        report = child_report(args, proc.wait(), out.read(), "(stderr not kept)")
    names = report.get("thread_names", {})
    groups: dict[str, float] = {}
    for tid, (comm, ticks) in last.items():
        if tid in names:
            group = names[tid]
        elif comm.startswith("av:"):
            group = "FFmpeg decoder threads"
        else:
            group = "other native threads (x264, OpenCV)"
        groups[group] = groups.get(group, 0.0) + ticks / tick
    return report, groups


def thread_table(spec: ClipSpec, rounds: int, work: Path) -> None:
    """CPU seconds per thread of plain and fix, the mean of ``rounds`` alternating runs.

    A third job, "plain, fix's pictures", transcodes fix's own output written
    losslessly (FFV1): its x264 threads show what encoding the corrected
    pictures costs, apart from anything else fix does.
    """
    spec.render()
    lossless = work / "fixed_pictures.mkv"
    run_child(cli_args("fix", str(spec.file), str(lossless), "--readout", f"{spec.readout * 1e3:g}ms",
                       "--codec", "ffv1", "--force", "--quiet"))
    jobs = {"plain": job_args("plain", spec, work / f"plain{spec.file.suffix}"),
            "fix": job_args("fix", spec, work / f"fix{spec.file.suffix}"),
            "plain, fix's pictures": job_args("plain", spec, work / "again.mp4", source=lossless)}
    sums: dict[str, dict[str, float]] = {job: {} for job in jobs}
    walls = dict.fromkeys(jobs, 0.0)
    sampler_cpu = time.process_time()
    for _ in range(rounds):
        for job, args in jobs.items():
            report, groups = sample_threads(args)
            walls[job] += report["seconds"] / rounds
            for group, seconds in groups.items():
                sums[job][group] = sums[job].get(group, 0.0) + seconds / rounds
    sampler_cpu = (time.process_time() - sampler_cpu) / (rounds * len(jobs))
    print(f"CPU seconds per thread, {spec.label}, {spec.frames} frames, mean of {rounds} alternating round(s) "
          f"(sampled from /proc every 10 ms; a thread's last sample counts; the sampler itself used "
          f"{sampler_cpu:.2f} s of CPU a job)")
    groups = sorted({g for v in sums.values() for g in v}, key=lambda g: -sums["fix"].get(g, 0.0))
    head = f"{'thread':38} " + " ".join(f"{job:>22}" for job in jobs)
    print(head)
    print("-" * len(head))
    for group in groups:
        print(f"{group:38} " + " ".join(f"{sums[job].get(group, 0.0):22.2f}" for job in jobs))
    total = {job: sum(v.values()) for job, v in sums.items()}
    print(f"{'all threads':38} " + " ".join(f"{total[job]:22.2f}" for job in jobs))
    print(f"{'wall seconds':38} " + " ".join(f"{walls[job]:22.2f}" for job in jobs))
    print(f"{'cores busy (CPU / wall)':38} " + " ".join(f"{total[job] / walls[job]:22.2f}" for job in jobs))
    cores = os.cpu_count() or 1
    print(f"fix/plain if fix kept all {cores} cores busy: {total['fix'] / cores / walls['plain']:.2f}x "
          f"(measured {walls['fix'] / walls['plain']:.2f}x)")
    x264 = "other native threads (x264, OpenCV)"
    dearer = sums["plain, fix's pictures"][x264] / sums["plain"][x264]
    print(f"x264 on fix's pictures / on the source's: {dearer:.2f}x "
          "(the same encoder settings; what encoding the corrected pictures costs beyond the source's)")


# -- fix against the floor ----------------------------------------------------------------

FLOOR_TARGETS = {"cubic": (1.35, 1.15), "linear": (1.20, 1.05)}  # (target, aim) of fix/floor


def load_now() -> float:
    return os.getloadavg()[0]


def floor_table(specs: list[ClipSpec], repeats: int, work: Path) -> None:
    """fix against the floor (decode the source + encode fix's own pictures), alternating.

    For each clip, fix's pictures are made once (fix writing FFV1, lossless, untimed). Then
    ``repeats`` rounds of: the floor job, fix, and the plain transcode, each in a fresh process;
    the best (smallest) wall and CPU of each are compared, with the 1-minute load average taken
    just before that run beside it.
    """
    print(f"fix against the floor, fastest of {repeats} alternating round(s), every run a fresh process")
    print("floor = decode the source + encode fix's corrected pictures (made once, decoded into memory "
          "untimed, picture types cleared, the source's timestamps), same encoder settings as fix")
    print("wall/CPU in seconds, (load) = 1-minute load average just before that run; own CPU = "
          "(fix CPU - floor CPU) per frame")
    head = (f"{'clip':40} {'frames':>6} {'floor s':>13} {'fix s':>13} {'fix/floor':>9} {'target':>7} {'':4} "
            f"{'floor CPU':>9} {'fix CPU':>8} {'CPU ratio':>9} {'':4} {'own ms/f':>8} {'plain s':>7} {'fix/plain':>9}")
    print(head)
    print("-" * len(head))
    for spec in specs:
        spec.render()
        pictures = work / f"pictures_{spec.width}_{spec.codec}_{spec.interpolation}.mkv"
        run_child(cli_args("fix", str(spec.file), str(pictures), "--readout", f"{spec.readout * 1e3:g}ms",
                           "--codec", "ffv1", "--interpolation", spec.interpolation, "--force", "--quiet"))
        suffix = spec.file.suffix
        runs: dict[str, list[tuple[dict, float]]] = {"floor": [], "fix": [], "plain": []}
        for _ in range(repeats):
            for job in runs:
                load = load_now()
                if job == "floor":
                    args = [sys.executable, __file__, "--child", "floor", str(spec.file), str(pictures),
                            str(work / f"floor{suffix}"), spec.codec]
                else:
                    args = job_args(job, spec, work / f"{job}{suffix}")
                runs[job].append((run_child(args)[0], load))
        best = {job: min(r, key=lambda item: item[0]["seconds"]) for job, r in runs.items()}
        cpu = {job: min(report["cpu_s"] for report, _ in r) for job, r in runs.items()}
        (fl, fl_load), (fx, fx_load), (pl, _) = best["floor"], best["fix"], best["plain"]
        target, aim = FLOOR_TARGETS[spec.interpolation]
        wall_ratio, cpu_ratio = fx["seconds"] / fl["seconds"], cpu["fix"] / cpu["floor"]
        own = 1e3 * (cpu["fix"] - cpu["floor"]) / spec.frames
        print(f"{spec.label:40} {spec.frames:6d} {fl['seconds']:7.2f} ({fl_load:3.1f}) {fx['seconds']:7.2f} "
              f"({fx_load:3.1f}) {wall_ratio:8.2f}x {'<=' + format(target, '.2f'):>7} {verdict(wall_ratio, target):4} "
              f"{cpu['floor']:9.2f} {cpu['fix']:8.2f} {cpu_ratio:8.2f}x {verdict(cpu_ratio, target):4} {own:8.1f} "
              f"{pl['seconds']:7.2f} {fx['seconds'] / pl['seconds']:8.2f}x")
    print("targets: cubic (the default) <= 1.35x, aim 1.15x; --interpolation linear <= 1.20x, aim 1.05x; "
          "wall and CPU alike")


def limit_table(spec: ClipSpec, repeats: int, work: Path) -> None:
    """The floor, the bare stages (`bare_job`) and fix, linear and cubic, alternating; CPU ratios.

    A second measurement of what the ratio targets allow, independent of skewfix's code: if the
    bare stages alone cost more than a target over the floor, no fix built from them meets it.
    """
    spec.render()
    pictures = work / "pictures_limit.mkv"  # fix's default (cubic) pictures serve both floors: x264 costs
    # the same within a few per cent on fix's pictures and the source's, so linear's hardly differ
    run_child(cli_args("fix", str(spec.file), str(pictures), "--readout", f"{spec.readout * 1e3:g}ms",
                       "--codec", "ffv1", "--force", "--quiet"))
    suffix = spec.file.suffix
    jobs = {"floor": [sys.executable, __file__, "--child", "floor", str(spec.file), str(pictures),
                      str(work / f"floor{suffix}"), spec.codec]}
    for interp in ("linear", "cubic"):
        for job in ("warp only", "bare", "fix"):
            child = "bare" if job == "warp only" else job
            jobs[f"{job} {interp}"] = [sys.executable, __file__, "--child", child, str(spec.file),
                                       str(work / f"{child}{suffix}"), spec.codec, repr(spec.readout), interp]
            if job == "warp only":
                jobs[f"{job} {interp}"].append("warp-only")
    runs: dict[str, list[tuple[dict, float]]] = {job: [] for job in jobs}
    for _ in range(repeats):
        for job, args in jobs.items():
            load = load_now()
            runs[job].append((run_child(args)[0], load))
    print(f"the floor, the bare stages and fix, {spec.label}, {spec.frames} frames, best of {repeats} "
          "alternating round(s), every run a fresh process")
    print("bare = decode, 960 px proxy, phase seed, Lucas-Kanade both ways from 288 grid points, strip-wise "
          "cv2.warpAffine of every plane, encode: OpenCV and PyAV only, one thread of its own; warp only = "
          "the same without proxy and tracking")
    head = f"{'job':17} {'wall s':>7} {'CPU s':>7} {'(load)':>6} {'CPU/floor':>9} {'own ms/f':>8}"
    print(head)
    print("-" * len(head))
    floor_cpu = min(r["cpu_s"] for r, _ in runs["floor"])
    for job, reports in runs.items():
        report, load = min(reports, key=lambda item: item[0]["cpu_s"])
        own = 1e3 * (report["cpu_s"] - floor_cpu) / spec.frames
        print(f"{job:17} {min(r['seconds'] for r, _ in reports):7.2f} {report['cpu_s']:7.2f} ({load:4.1f}) "
              f"{report['cpu_s'] / floor_cpu:8.2f}x {own:8.1f}")
    print("targets for fix (CPU/floor): cubic <= 1.35x, linear <= 1.20x")


# -- cost of each stage on one core ------------------------------------------------------

def best_of(passes: int, run, clock=time.thread_time) -> float:
    """The least ``clock`` time (s) of ``passes`` calls of ``run()``: the least disturbed one."""
    best = float("inf")
    for _ in range(passes):
        t = clock()
        run()
        best = min(best, clock() - t)
    return best


def stage_costs(spec: ClipSpec, frames: int = 24, passes: int = 3) -> None:
    """CPU milliseconds per frame of each stage run alone on one thread, and what they imply.

    Buffers are reused and every stage is warmed up first, so page faults and
    imports are left out; each stage is timed ``passes`` times over the same
    frames and the least is kept. The floor is the fix/plain ratio if both jobs
    kept every core busy: (plain CPU + skewfix's own stages) / plain CPU.
    """
    import av
    import cv2
    import numpy as np

    from skewfix.buffers import PlanePool
    from skewfix.decode import VideoInfo, frame_planes
    from skewfix.motion import fit_motion
    from skewfix.pipeline import FrameWarper, RenderSettings, window_for
    from skewfix.rowclock import RowClock
    from skewfix.track import PairTracker
    from skewfix.warp import correction_map

    spec.render()
    cv2.setNumThreads(1)
    cost = {}

    def decode():
        with av.open(str(spec.file)) as c:
            stream = c.streams.video[0]
            stream.thread_type = "SLICE"
            return [f for _, f in zip(range(frames), c.decode(stream))]

    decoded = decode()
    cost["decode (FFmpeg, one thread)"] = best_of(passes, decode)
    pool = PlanePool(limit=8)

    def copy_planes():
        for f in decoded:
            pool.give(*frame_planes(f, pool)[0])

    copy_planes()
    cost["copy planes out of the decoder"] = best_of(passes, copy_planes)
    planes = [frame_planes(f) for f in decoded]
    pairs = []

    def track():
        tracker = PairTracker()
        pairs[:] = [obs for obs in (tracker.push(p[0]) for p, _subs in planes) if obs is not None]

    track()
    cost["track (proxy, corners, phase seed, LK both ways)"] = best_of(passes, track)
    clock = RowClock(np.arange(frames) / float(RATE), spec.height, spec.readout)
    vinfo = VideoInfo(str(spec.file), spec.width, spec.height, "yuv420p", 8, "h264", None, RATE, Fraction(1, 25),
                      frames, None)
    window, margin = window_for(vinfo)
    model = fit_motion(pairs, clock, spec.width)  # warm-up
    cost[f"fit (x{(window + 2 * margin) / window:.2f}: windows overlap)"] = \
        best_of(passes, lambda: fit_motion(pairs, clock, spec.width)) * (window + 2 * margin) / window
    maps = [correction_map(model, clock, k) for k in range(frames)]
    cost["coarse warp map"] = best_of(passes, lambda: [correction_map(model, clock, k) for k in range(frames)])
    for interp in ("cubic", "linear"):
        warper = FrameWarper.__new__(FrameWarper)
        warper.settings, warper.info, warper.pool = RenderSettings(interpolation=interp), vinfo, PlanePool()

        def warp():
            for wm, (p, subs) in zip(maps, planes):
                warper.pool.give(*warper.apply_map(wm, p, subs))

        warp()
        cost[f"upsample maps + remap planes ({interp})"] = best_of(passes, warp)
    encoder, options = ENCODE[spec.codec]

    def encode():
        with tempfile.TemporaryDirectory() as tmp, av.open(str(Path(tmp) / "e.mp4"), "w") as out:
            st = out.add_stream(encoder, rate=RATE)
            st.width, st.height, st.pix_fmt, st.options = spec.width, spec.height, "yuv420p", dict(options)
            for i, f in enumerate(decoded):
                f.pts = i
                for packet in st.encode(f):
                    out.mux(packet)
            for packet in st.encode():
                out.mux(packet)

    cost["encode (x264, all its threads)"] = best_of(passes, encode, time.process_time)
    per = {k: 1e3 * v / frames for k, v in cost.items()}
    print()
    print(f"cost of each stage, {spec.label}, {frames} frames, CPU ms per frame on one thread "
          f"(buffers reused, warmed up, least of {passes} passes)")
    for k, v in per.items():
        print(f"  {k:48} {v:7.2f}")
    plain = per["decode (FFmpeg, one thread)"] + per["encode (x264, all its threads)"]
    ours = {interp: sum(v for k, v in per.items() if k not in ("decode (FFmpeg, one thread)",
                                                                  "encode (x264, all its threads)")
                       and not (k.startswith("upsample") and interp not in k))
            for interp in ("cubic", "linear")}
    for interp, extra in ours.items():
        print(f"  floor with {interp:6}: ({plain:.1f} + {extra:.1f}) / {plain:.1f} = {(plain + extra) / plain:.2f}x "
              "(fix/plain if every core were busy in both)")


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    ap.add_argument("--quick", action="store_true", help="shorter clips and one repeat (a smoke run)")
    ap.add_argument("--repeats", type=int, default=None, help="alternating runs of each job (default 2, quick 1)")
    ap.add_argument("--profile", action="store_true", help="also profile one 1080p fix")
    ap.add_argument("--against", metavar="REV",
                    help="only this tree's fix against REV's (a git revision), alternating with the plain "
                         "transcode in one run, on the 1080p clip and the one four times longer")
    ap.add_argument("--costs", action="store_true",
                    help="only the CPU cost of each stage on one thread at 1080p, and the floor it implies")
    ap.add_argument("--floor", action="store_true",
                    help="only fix against the floor (decode + encode of fix's own pictures), 1080p cubic and "
                         "linear, 4K and 10-bit ProRes")
    ap.add_argument("--limit", action="store_true",
                    help="only the floor, the bare stages (OpenCV and PyAV, no skewfix code) and fix at 1080p, "
                         "linear and cubic: what the ratio targets allow")
    ap.add_argument("--threads", action="store_true",
                    help="only CPU seconds per thread of plain and fix on the 1080p clip")
    argv = sys.argv[1:] if argv is None else list(argv)
    if argv[:1] == ["--child"]:  # internal: one measured job in a fresh process
        child_main(*argv[1:])
        return 0
    args = ap.parse_args(argv)
    compile_bytecode(Path(__file__).resolve().parent.parent)
    repeats = args.repeats or (1 if args.quick else 2)
    specs = clip_specs(args.quick)
    if args.costs:
        stage_costs(specs["1080"])
        return 0
    if args.floor:
        with tempfile.TemporaryDirectory(prefix="skewfix-bench-") as tmp:
            keys = ("1080", "1080lin") if args.quick else ("1080", "1080lin", "4k", "prores")
            floor_table([specs[k] for k in keys], args.repeats or 3, Path(tmp))
        return 0
    if args.limit:
        with tempfile.TemporaryDirectory(prefix="skewfix-bench-") as tmp:
            limit_table(specs["1080"], args.repeats or 3, Path(tmp))
        return 0
    if args.threads:
        with tempfile.TemporaryDirectory(prefix="skewfix-bench-") as tmp:
            thread_table(specs["1080"], args.repeats or 3, Path(tmp))
        return 0
    if args.against:
        with tempfile.TemporaryDirectory(prefix="skewfix-bench-") as tmp:
            against(args.against, [specs["1080"], specs["1080long"]], args.repeats or 4, Path(tmp))
        return 0
    with tempfile.TemporaryDirectory(prefix="skewfix-bench-") as tmp:
        work = Path(tmp)
        for spec in specs.values():
            spec.render()
        loads = [os.getloadavg()[0]]
        pairs = {key: compare(spec, repeats, work) for key, spec in specs.items()}
        flicker = flicker_row(work)
        loads.append(os.getloadavg()[0])
        print_table(pairs, flicker, repeats, loads, args.quick)
        if args.profile:
            profile_fix(specs["1080"], work)
    return 0


if __name__ == "__main__":
    sys.exit(main())
