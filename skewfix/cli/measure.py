"""`skewfix measure`: measure a camera mode's readout time from a test clip or the shot itself."""

from __future__ import annotations

import json
import math
import os
import re
from pathlib import Path
from typing import Optional

import numpy as np
import typer

from skewfix.cli import app
from skewfix.cli.options import (choice, distortion_option, flag, focal_option, frames_option, hfov_option,
                                 model_and_lens, model_option)
from skewfix.files import write_whole
from skewfix.cli.progress import TerminalProgress
from skewfix.errors import MeasurementRefused, UsageProblem
from skewfix.framerange import first_frame_number, parse_frame_range
from skewfix.rowclock import clip_frame_interval, parse_duration, parse_rate

METHODS = ("auto", "flicker", "pan", "motion")

SAFETY_TEXT = (
    "Safety: flickering and strobing lights can trigger seizures in people with photosensitive "
    "epilepsy; warn everyone present before switching a flicker or strobe light on. Mains-powered "
    "light rigs are for qualified hands: follow your local electrical codes and licensed practice."
)

HELP = (
    "Measure the readout time (first to last row) of the camera mode that shot CLIP.\n\n"
    "Methods: 'flicker' for a steady shot of a plain, evenly lit wall under a flickering light "
    "(give --light-hz: 100 or 120 for mains lighting on 50 or 60 Hz, twice the mains frequency, or "
    "an LED driver's rate, or 'auto'; shoot at a fast shutter; --flat for a flat-field take); 'pan' for steady pans across vertical edges, ideally one way and "
    "back; 'motion' for ordinary footage whose motion changes (whip pans that speed up and stop, "
    "handheld). 'auto' (the default) tries flicker when --light-hz is given, then motion, then "
    "pan, says why the others could not measure the clip, and what to do when none could.\n\n" + SAFETY_TEXT
)

NEXT_STEPS = (
    "what to do next: shoot a flicker test (a plain wall under a mains lamp, --light-hz 100 or 120) or a "
    "pan test (steady pans across vertical edges), use a saved camera of this mode (--readout NAME), or "
    "compare candidate readouts by eye with preview --readout 12ms,16ms,20ms"
)

_SHUTTER = re.compile(r"^\s*1\s*/\s*([0-9]*\.?[0-9]+)\s*(s)?\s*$")


def parse_exposure(text: str | None) -> float | None:
    """Shutter time: ``1/1000`` (a shutter speed), ``2ms``, ``0.002s``; a bare number is ms."""
    if text is None:
        return None
    match = _SHUTTER.match(text)
    if match:
        speed = float(match.group(1))
        if speed <= 0:
            raise UsageProblem(f"not an exposure: {text!r}")
        return 1.0 / speed
    try:
        seconds = parse_duration(text)
    except UsageProblem:
        raise UsageProblem(f"not an exposure: {text!r} (use e.g. 1/1000, 1ms or 0.001s; "
                           "a bare number is ms)") from None
    if seconds <= 0:
        raise UsageProblem(f"the exposure must be longer than 0: {text!r}")
    return seconds


def parse_light_hz(text: str | None):
    """``--light-hz``: None, "auto", or a positive frequency in Hz."""
    if text is None:
        return None
    if text.strip().lower() == "auto":
        return "auto"
    try:
        value = float(text.strip().removesuffix("Hz").removesuffix("hz"))
    except ValueError:
        raise UsageProblem(f"--light-hz must be a frequency in Hz or 'auto', not {text!r}") from None
    if not (math.isfinite(value) and value > 0):
        raise UsageProblem(f"--light-hz must be a positive frequency, not {text}")
    return value


def frame_ranges(indices) -> str:
    """``[1, 2, 3, 7, 9, 10]`` -> ``1-3, 7, 9-10``."""
    ks = sorted({int(k) for k in indices})
    if not ks:
        return "none"
    parts, start, prev = [], ks[0], ks[0]
    for k in ks[1:] + [None]:
        if k is not None and k == prev + 1:
            prev = k
            continue
        parts.append(f"{start}-{prev}" if prev > start else f"{start}")
        if k is not None:
            start = prev = k
    return ", ".join(parts)


def check_report_path(path: str | None, clip: str, what: str) -> Path | None:
    """Refuse a report path that is the clip itself, a folder, or in a missing/unwritable folder."""
    if path is None:
        return None
    out = Path(path)
    if os.path.realpath(out) == os.path.realpath(clip) or (
            out.exists() and Path(clip).exists() and os.path.samefile(out, clip)):
        raise UsageProblem(f"{what} {path}: is the clip itself; the input is never overwritten")
    from skewfix.encode import check_writable_file_path

    return check_writable_file_path(out, what)


def _finite_or_none(value):
    """JSON has no NaN or infinity: such numbers are written as null."""
    if isinstance(value, float) and not math.isfinite(value):
        return None
    if isinstance(value, dict):
        return {k: _finite_or_none(v) for k, v in value.items()}
    if isinstance(value, (list, tuple)):
        return [_finite_or_none(v) for v in value]
    return value


def write_json(path: Path, data: dict) -> None:
    write_whole(path, json.dumps(_finite_or_none(data), indent=2, allow_nan=False) + "\n")


def _profiles(clip: str, fps, progress, stage: str = "analyse", frames=None):
    """Row profiles frame by frame (never the frames themselves), the frame times and the clip's info."""
    from skewfix.decode import open_source
    from skewfix.measure.flicker import row_profiles_from_luma
    from skewfix.pipeline import black_levels, expected_frames

    profiles, times = [], []
    with open_source(clip, fps, frames) as source:
        info = source.info
        black = black_levels(info, 1)[0]
        total = expected_frames(info)
        for frame in source.frames():
            profiles.append(row_profiles_from_luma(frame.luma, black_level=black))
            times.append(frame.time)
            progress(stage, len(times), total)
    if not profiles:
        from skewfix.errors import InputError

        raise InputError(f"{clip}: no frame could be decoded")
    return np.stack(profiles), np.asarray(times), info


def flat_field(path: str, fps, height: int, progress) -> np.ndarray:
    """The mean row profile of a flat-field take (``--flat``), checked against the clip's height."""
    profiles, _, info = _profiles(path, fps, progress, "flat field")
    if profiles.shape[1] != height:
        from skewfix.errors import InputError

        raise InputError(f"{path}: the flat field is {info.width}x{info.height}, the clip has {height} rows; "
                         "shoot the flat field in the same camera mode")
    return profiles.mean(axis=0)


def run_flicker(clip: str, light_hz, exposure_s, fps, progress, flat: str | None = None, frames=None):
    """The joint flicker fit, under ``light_hz`` (a number, or "auto") with an optional flat field."""
    from skewfix.measure.flicker import measure_flicker, measure_flicker_auto

    profiles, times, info = _profiles(clip, fps, progress, frames=frames)
    interval = clip_frame_interval(info.frame_interval, times)
    if not interval:
        raise UsageProblem(f"{clip}: the frame rate is not known (give --fps)")
    flat_profile = flat_field(flat, fps, profiles.shape[1], progress) if flat else None
    try:
        if light_hz == "auto":
            return measure_flicker_auto(profiles, times, interval, exposure_s, flat_profile), info
        return measure_flicker(profiles, times, light_hz, interval, exposure_s, flat_profile=flat_profile), info
    except MeasurementRefused as exc:
        again = MeasurementRefused(f"{clip}: {exc}")
        again.partial = getattr(exc, "partial", None)
        raise again from None


class _Measurer:
    """Runs the methods on one clip, sharing one analysis pass between motion and pan.

    The motion method first chooses the motion model (``model``, ``lens``: as
    `skewfix.models.choice.choose_model` takes them) on the tracks at no
    readout, then measures the readout with it; a focal length estimated from
    the footage is measured again at that readout, as ``fix --readout auto`` does.
    """

    def __init__(self, clip, fps, light_hz, exposure_s, progress, model="auto", lens=None, flat=None, frames=None):
        from skewfix.models.choice import LensSpec

        self.clip, self.fps, self.light_hz, self.exposure_s = clip, fps, light_hz, exposure_s
        self.flat = flat
        self.progress, self.frames = progress, frames
        self.model, self.lens = model, lens or LensSpec()
        self.analysis = None
        self.info = None
        self.choice = None  # the motion method's model choice, reused by save_motion

    def _analysis(self):
        if self.analysis is None:
            from skewfix.pipeline import analyse

            self.analysis = analyse(self.clip, self.fps, progress=self.progress, frames=self.frames)
            self.info = self.analysis.info
        return self.analysis

    def run(self, method: str):
        if method == "flicker":
            estimate, self.info = run_flicker(self.clip, self.light_hz, self.exposure_s, self.fps,
                                              self.progress, self.flat, self.frames)
            return estimate
        if method == "pan":
            from skewfix.measure.pan import measure_pan

            return measure_pan(self.clip, self._analysis(), self.fps)
        return self._run_motion()

    def _run_motion(self):
        from skewfix.measure.result import ModelUsed
        from skewfix.measure.motion_fit import measure_motion
        from skewfix.pipeline import choose_with_readout

        found = {}

        def resolver(analysis, kind):
            est = found["estimate"] = measure_motion(analysis, None, kind=kind, progress=self.progress)
            return est.readout_s, est.line_order, None

        _, _, _, chosen = choose_with_readout(self._analysis(), self.model, self.lens, 0.0, "top-down", resolver)
        estimate = found["estimate"]
        self.choice = chosen
        estimate.model = ModelUsed.from_kind(chosen.kind, chosen.reason)
        return estimate

    def save_motion(self, estimate, json_path, csv_path) -> None:
        """Solve the clip's motion with the measured readout and save it (motion file, table),
        with the motion method's model, else one chosen at the measured readout."""
        from skewfix.motionfile import save_motion, save_motion_csv
        from skewfix.sequence import first_frame_number
        from skewfix.pipeline import choose_for_analysis, solve

        order = estimate.line_order if estimate.line_order != "undetermined" else "top-down"
        analysis = self._analysis()
        choice = self.choice or choose_for_analysis(analysis, self.model, self.lens, estimate.readout_s, order)
        clock, model = solve(analysis, estimate.readout_s, order, choice=choice)
        if json_path:
            save_motion(json_path, model, clock, "middle", self.analysis.info)
        if csv_path:
            save_motion_csv(csv_path, model, clock, "middle", first_number=first_frame_number(analysis.info))


def plot_estimate(estimate, path: Path, refused: str | None = None) -> None:
    """The method's plot; for a refusal (``estimate`` None, or what the method saw) one
    marked as refused, with the reason."""
    from skewfix.measure.plots import plot_refusal

    if estimate is None or not estimate.diagnostics:
        write_whole(path, lambda tmp: plot_refusal(refused or "no result", tmp))
        return
    if estimate.method == "flicker":
        from skewfix.measure.flicker import plot_flicker as plot
    elif estimate.method == "pan":
        from skewfix.measure.pan import plot_pan as plot
    else:
        from skewfix.measure.plots import plot_residual_curve as plot
    write_whole(path, lambda tmp: plot(estimate, tmp, refused=refused))


def summary_lines(estimate) -> list[str]:
    ms = estimate.readout_s * 1e3
    sigma = estimate.uncertainty_s * 1e3
    lines = [f"readout       {ms:.3f} ms ± {sigma:.3f} ms (one sigma)"]
    lines.append(f"line delay    {estimate.line_delay_s * 1e6:.4f} µs per row over {estimate.height} rows")
    if estimate.frame_interval and math.isfinite(estimate.frame_interval):
        lines.append(f"frame share   {estimate.readout_fraction:.1%} of the "
                     f"{estimate.frame_interval * 1e3:.3f} ms frame interval")
    lines.append(f"line order    {estimate.line_order}")
    lines.append(f"method        {estimate.method}")
    if getattr(estimate, "model", None) is not None:
        lines.append(f"model         {estimate.model.line()}")
    lines.append(f"frames        {frame_ranges(estimate.frames_used)} ({len(estimate.frames_used)} in all)")
    return lines


@app.command("measure", help=HELP)
def measure_command(
    clip: str = typer.Argument(..., help="Test clip or shot (or a numbered image sequence with --fps)."),
    method: str = typer.Option("auto", "--method", "-m", metavar="METHOD",
                               help="auto, flicker, pan or motion."),
    light_hz: Optional[str] = typer.Option(
        None, "--light-hz", metavar="HZ",
        help="Flicker frequency of the light's intensity, Hz: 100/120 for mains at 50/60 Hz (twice the "
             "mains frequency: 100, not 50), or 'auto' to pick 100 or 120 from the band drift. "
             "Flickering lights can trigger photosensitive seizures."),
    flat: Optional[str] = typer.Option(
        None, "--flat", metavar="CLIP",
        help="A flat-field take for the flicker method: the same wall in the same camera mode under "
             "steady light (or at an exposure of a whole number of flicker periods), divided out so the "
             "wall's own shading cannot pass for still bands."),
    json_path: Optional[str] = typer.Option(None, "--json", metavar="FILE.json",
                                            help="Also write the result as JSON here."),
    plot: Optional[str] = typer.Option(None, "--plot", metavar="FILE.png",
                                       help="Write a PNG to check the result by eye."),
    save_camera: Optional[str] = typer.Option(None, "--save-camera", metavar="NAME",
                                              help="Save the result as a camera of this name "
                                                   "(for fix --readout NAME)."),
    exposure: Optional[str] = typer.Option(None, "--exposure", metavar="TIME",
                                           help="Shutter time of the clip (1/1000, 1ms), to explain "
                                                "weak flicker bands."),
    fps: Optional[str] = typer.Option(None, "--fps", metavar="RATE", help="Frame rate of an image-sequence input."),
    frames: Optional[str] = frames_option(),
    save_motion: Optional[str] = typer.Option(None, "--save-motion", metavar="FILE.json",
                                              help="Also solve the clip's motion with the measured readout "
                                                   "and write it (JSON motion file)."),
    save_motion_csv: Optional[str] = typer.Option(None, "--save-motion-csv", metavar="FILE.csv",
                                                  help="The same motion as a table, one row per frame (CSV)."),
    model: str = model_option(),
    hfov: Optional[str] = hfov_option(),
    focal_length: Optional[str] = focal_option(),
    lens_distortion: Optional[str] = distortion_option(),
    quiet: bool = flag("--quiet", "-q", help="Only the result line; no progress or notes."),
):
    """Measure the readout time (first to last row) of the camera mode that shot CLIP."""
    choice(method, METHODS, "--method")
    model, lens = model_and_lens(model, hfov, focal_length, lens_distortion)
    motion_json = check_report_path(save_motion, clip, "--save-motion")
    motion_csv = check_report_path(save_motion_csv, clip, "--save-motion-csv")
    light_hz = parse_light_hz(light_hz)
    if flat is not None and not Path(flat).exists() and "%" not in flat and "#" not in flat:
        raise UsageProblem(f"--flat {flat}: no such file")
    if flat is not None and os.path.realpath(flat) == os.path.realpath(clip):
        raise UsageProblem("--flat names the clip itself: shoot the flat field as a take of its own")
    if method == "flicker" and light_hz is None:
        raise UsageProblem("--method flicker needs --light-hz (100 or 120 for mains lighting on "
                           "50 or 60 Hz, or the LED driver's rate)")
    exposure_s = parse_exposure(exposure)
    rate = parse_rate(fps)
    json_out = check_report_path(json_path, clip, "--json")
    plot_out = check_report_path(plot, clip, "--plot")
    if json_out is not None and plot_out is not None and os.path.realpath(json_out) == os.path.realpath(plot_out):
        raise UsageProblem("--json and --plot name the same file")
    if save_camera is not None:
        from skewfix.cameras import check_name

        save_camera = check_name(save_camera)

    say = (lambda *_: None) if quiet else (lambda m: typer.echo(m, err=True))
    if method in ("flicker", "auto") and light_hz is not None and not quiet:
        say("note: " + SAFETY_TEXT)
    if method == "auto":
        order = (["flicker"] if light_hz is not None else []) + ["motion", "pan"]
    else:
        order = [method]
        if light_hz is not None and method != "flicker":
            say(f"note: --light-hz is only used by the flicker method, not {method}")
        if (model != "auto" or lens is not None) and method != "motion" and save_motion is None \
                and save_motion_csv is None:
            say(f"note: --model and the lens options are only used by the motion method and --save-motion, "
                f"not {method}")

    refused: list[tuple[str, str]] = []
    partial = None  # what a refused method saw, for --plot
    estimate = None
    with TerminalProgress(quiet) as progress:
        measurer = _Measurer(clip, rate, light_hz, exposure_s, progress, model, lens, flat,
                             parse_frame_range(frames))
        for name in order:
            try:
                estimate = measurer.run(name)
                break
            except MeasurementRefused as exc:
                partial = partial or getattr(exc, "partial", None)
                refused.append((name, str(exc)))
                if method != "auto":
                    break
    if estimate is None:
        if method == "auto":
            message = ("no method could measure this clip: " + "; ".join(f"{name}: {why}" for name, why in refused)
                       + "; " + NEXT_STEPS)
        else:
            message = refused[-1][1]
        if plot_out is not None:
            plot_estimate(partial, plot_out, refused=message)
            say(f"wrote {plot_out} (marked as refused)")
        raise MeasurementRefused(message)
    # the frames used, in the clip's numbering (README: frame numbers), not as positions in the part read
    first = first_frame_number(measurer.info)
    estimate.frames_used = [first + int(k) for k in estimate.frames_used]

    if quiet:
        typer.echo(f"readout {estimate.readout_s * 1e3:.3f} ms ± {estimate.uncertainty_s * 1e3:.3f} ms "
                   f"({estimate.line_order}, {estimate.method})")
    else:
        for line in summary_lines(estimate):
            typer.echo(line)
        if method == "auto":
            tried = "; ".join(f"{name} could not: {why}" for name, why in refused)
            say(f"note: auto chose {estimate.method}" + (f" ({tried})" if tried else ""))
        for note in estimate.notes:
            say(f"note: {note}")

    if json_out is not None:
        write_json(json_out, estimate.to_json_dict())
        say(f"wrote {json_out}")
    if plot_out is not None:
        plot_estimate(estimate, plot_out)
        say(f"wrote {plot_out}")
    if motion_json is not None or motion_csv is not None:
        measurer.save_motion(estimate, motion_json, motion_csv)
        for written in (motion_json, motion_csv):
            if written is not None:
                say(f"wrote {written}")
    if save_camera is not None:
        from skewfix.cameras import camera_path, save_camera as save

        replaced = camera_path(save_camera).exists()
        where = save(save_camera, estimate, measurer.info, clip=Path(clip).name)
        say(f"{'replaced' if replaced else 'saved'} camera '{save_camera}' in {where}")
