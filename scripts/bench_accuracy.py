"""Correction accuracy against exact ground truth (issue 2's targets).

Renders rolling-shutter clips from known camera paths over scikit-image's
bundled photographs, runs the correction pipeline, and compares each corrected
frame with the exact global-shutter view at its reference instant. Prints one
table: the residual for the corrected clip, the uncorrected clip and the
metric's floor (the exact global-shutter views themselves, through the same
H.264 encode).

    python scripts/bench_accuracy.py [--frames N]
"""

from __future__ import annotations

import argparse
import sys
import tempfile
import time
from fractions import Fraction
from pathlib import Path

import av
import numpy as np

from skewfix.motion import FitSettings
from skewfix.pipeline import FixOptions, fix_clip
from skewfix.synth.paths import Handheld, SteadyPan, WhipPan
from skewfix.synth.residual import clip_residual, decode_rgb, psnr
from skewfix.synth.scenes import photo_panorama
from skewfix.synth.shutter import render_clip, to_uint8, write_rgb_clip


def scenario(name, camera, rate, readout, frames, tmp, fit=None, width=960, height=540):
    scene = photo_panorama(int(height * 1.5), 9000)
    slug = "".join(ch if ch.isalnum() else "_" for ch in name)
    src = tmp / f"{slug}.mp4"
    renderer, clock = render_clip(src, scene, camera, width, height, rate, frames, readout,
                                  origin=(width * 0.8, height * 0.75), audio=readout == 0)
    truths = [renderer.global_view(float(clock.reference_time(k))) for k in range(frames)]
    floor_clip = tmp / f"{slug}_truth.mp4"
    write_rgb_clip(floor_clip, (to_uint8(t, 0.004, np.random.default_rng(1)) for t in truths), rate, crf=10)
    out = tmp / f"{slug}_fixed.mp4"
    t0 = time.perf_counter()
    fix_clip(str(src), str(out), FixOptions(readout=readout, force=True, fit=fit or FitSettings()))
    seconds = time.perf_counter() - t0
    fixed, orig, floor = decode_rgb(out), decode_rgb(src), decode_rgb(floor_clip)
    inner = range(2, frames - 2)  # the ends have one-sided tracks only
    truth8 = [to_uint8(t) for t in truths]
    row = {
        "scenario": name,
        "corrected_px": clip_residual(fixed, truth8, inner),
        "uncorrected_px": clip_residual(orig, truth8, inner),
        "floor_px": clip_residual(floor, truth8, inner),
        "fix_s": seconds,
    }
    if readout == 0:
        row["min_psnr_db"] = min(psnr(fixed[k], orig[k]) for k in range(frames))
        with av.open(str(out)) as c:
            row["audio_kept"] = any(s.type == "audio" for s in c.streams)
        row["frames_kept"] = len(fixed) == frames
    return row


def main(argv=None):
    ap = argparse.ArgumentParser(description=__doc__)
    ap.add_argument("--frames", type=int, default=36)
    args = ap.parse_args(argv)
    n = args.frames
    with tempfile.TemporaryDirectory() as d:
        tmp = Path(d)
        rows = [
            scenario("whip pan 23.976 fps, 19 ms, 175 px/frame", WhipPan(peak_px_s=175 * 24000 / 1001, centre_s=n / 2 / 23.976,
                     duration_s=0.9), Fraction(24000, 1001), 0.019, n, tmp),
            scenario("handheld 30 fps, 24 ms, 7-11 Hz + roll", Handheld(amplitude_px=10.0, roll_rad=0.01),
                     Fraction(30), 0.024, n, tmp),
            scenario("handheld, translation-only model", Handheld(amplitude_px=10.0, roll_rad=0.01),
                     Fraction(30), 0.024, n, tmp, fit=FitSettings(model="translation")),
            scenario("global shutter 25 fps, fast pan, audio", SteadyPan(vx_px_s=2500.0), Fraction(25), 0.0, n, tmp),
        ]
    head = f"{'scenario':44s} {'corrected':>10s} {'uncorrected':>12s} {'floor':>7s} {'fix s':>6s}  extra"
    print(head)
    print("-" * len(head))
    for r in rows:
        extra = ""
        if "min_psnr_db" in r:
            extra = f"min PSNR vs input {r['min_psnr_db']:.1f} dB, audio kept {r['audio_kept']}, frames kept {r['frames_kept']}"
        print(f"{r['scenario']:44s} {r['corrected_px']:10.3f} {r['uncorrected_px']:12.3f} {r['floor_px']:7.3f} "
              f"{r['fix_s']:6.1f}  {extra}")
    print("(residual optical flow RMS in px, textured pixels, central 76 %, median flow removed)")
    return 0


if __name__ == "__main__":
    sys.exit(main())
