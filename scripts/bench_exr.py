"""OpenEXR plates: read/write cost per frame, and `fix` on EXR against the same plate as 16-bit TIFF.

Writes a 1080p steady pan (scikit-image photographs, tests/truth.py's row clock, 20 ms
readout) once as half-float RGBA OpenEXR and once as 16-bit TIFF, then times in one run:
reading and writing one EXR frame with `skewfix.exr`, and `skewfix fix` on each
sequence (fresh child processes, alternating, best of the repeats; wall and CPU time,
peak resident memory from /proc's VmHWM). Prints one table.

    python scripts/bench_exr.py [--frames N] [--repeats N] [--size WxH]
"""

from __future__ import annotations

import argparse
import os
import subprocess
import sys
import tempfile
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path[:0] = [str(ROOT), str(ROOT / "tests")]

CHILD = r"""
import os, resource, sys, time
t0, c0 = time.perf_counter(), time.process_time()
from skewfix.cli import main
code = main(sys.argv[1:])
wall = time.perf_counter() - t0
cpu = sum(resource.getrusage(who)[0] + resource.getrusage(who)[1] for who in (resource.RUSAGE_SELF,))
peak = [l for l in open("/proc/self/status") if l.startswith("VmHWM")][0].split()[1]
print(f"RESULT {code} {wall:.3f} {cpu:.3f} {int(peak) / 1024:.0f}")
"""


def render(folder: Path, width: int, height: int, frames: int) -> None:
    import cv2
    import numpy as np

    import truth
    from skewfix.exr import write_exr

    clip = truth.PlanarClip(width, height, frames, 24, 0.020, truth.steady_pan(24.0, fps=24), seed=0)
    for k in range(frames):
        rgb = clip.view(clip.row_times(k)) / 255.0
        alpha = np.ones((height, width), np.float32)
        write_exr(folder / f"plate.{1001 + k:04d}.exr", ("R", "G", "B", "A"),
                  [rgb[..., 0], rgb[..., 1], rgb[..., 2], alpha], ("half",) * 4)
        tif = np.rint(np.clip(rgb, 0, 1) * 65535).astype(np.uint16)
        cv2.imwrite(str(folder / f"plate.{1001 + k:04d}.tif"), cv2.cvtColor(tif, cv2.COLOR_RGB2BGR))


def run_fix(folder: Path, ext: str) -> tuple[float, float, float]:
    out = folder / f"out_{ext}"
    out.mkdir(exist_ok=True)
    argv = ["fix", str(folder / f"plate.%04d.{ext}"), str(out / f"fixed.%04d.{ext}"), "--fps", "24",
            "--readout", "20ms", "--model", "similarity", "--force", "--quiet"]
    env = dict(os.environ, PYTHONPATH=str(ROOT))
    proc = subprocess.run([sys.executable, "-c", CHILD, *argv], capture_output=True, text=True, env=env)
    line = [l for l in proc.stdout.splitlines() if l.startswith("RESULT")]
    if not line or line[0].split()[1] != "0":
        raise SystemExit(f"fix failed: {proc.stderr[-2000:]}")
    _, _, wall, cpu, peak = line[0].split()
    return float(wall), float(cpu), float(peak)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--frames", type=int, default=24)
    parser.add_argument("--repeats", type=int, default=2)
    parser.add_argument("--size", default="1920x1080")
    args = parser.parse_args()
    width, height = (int(v) for v in args.size.lower().split("x"))
    from skewfix.exr import read_exr, write_exr

    with tempfile.TemporaryDirectory(prefix="skewfix-bench-exr-") as tmp:
        folder = Path(tmp)
        render(folder, width, height, args.frames)
        first = folder / "plate.1001.exr"
        t = time.perf_counter()
        for _ in range(5):
            image = read_exr(first)
        read_ms = (time.perf_counter() - t) / 5 * 1e3
        t = time.perf_counter()
        for _ in range(5):
            write_exr(folder / "probe.exr", image.names, image.planes, image.types, image.header)
        write_ms = (time.perf_counter() - t) / 5 * 1e3
        best = {}
        for _ in range(args.repeats):
            for ext in ("exr", "tif"):
                result = run_fix(folder, ext)
                if ext not in best or result[0] < best[ext][0]:
                    best[ext] = result
        print(f"{width}x{height}, {args.frames} frames, best of {args.repeats}")
        print(f"{'what':<38} {'value':>10}")
        print(f"{'read one half RGBA EXR frame (ms)':<38} {read_ms:>10.1f}")
        print(f"{'write one half RGBA EXR frame (ms)':<38} {write_ms:>10.1f}")
        for ext, label in (("exr", "fix, half RGBA EXR"), ("tif", "fix, 16-bit RGB TIFF")):
            wall, cpu, peak = best[ext]
            print(f"{label + ' wall (s)':<38} {wall:>10.2f}")
            print(f"{label + ' CPU (s)':<38} {cpu:>10.2f}")
            print(f"{label + ' peak memory (MB)':<38} {peak:>10.0f}")
        print(f"{'fix EXR / TIFF wall':<38} {best['exr'][0] / best['tif'][0]:>10.2f}")


if __name__ == "__main__":
    main()
