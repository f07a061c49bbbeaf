"""`skewfix preview`: one still of one frame as shot and corrected, rendering only that frame.

With several readouts (``--readout 12ms,16ms,20ms``) the still shows the frame
as shot and then one correction per readout, each labelled with it, so a
readout can be chosen by eye when the clip cannot measure it.
"""

from __future__ import annotations

from pathlib import Path
from typing import Optional

import typer

from skewfix.cli import app
from skewfix.cli.deliverables import check_distinct_outputs, decoded_frame_at, solve_with_model
from skewfix.cli.options import (border_option, choice, distortion_option, flag, focal_option, frames_option,
                                 hfov_option, line_order_option, model_and_lens, model_option,
                                 reference_line_option)
from skewfix.cli.progress import TerminalProgress
from skewfix.errors import InputError, UsageProblem
from skewfix.rowclock import LINE_ORDERS, REFERENCE_LINES
from skewfix.sequence import planes_to_rgb

MAX_CANDIDATES = 8  # readouts in one still (each panel gets narrower)


def candidate_readouts(text: str) -> list[str]:
    """``--readout`` split at commas: one readout, or the candidates to compare."""
    parts = [part.strip() for part in text.split(",")]
    if not all(parts):
        raise UsageProblem(f"--readout {text!r}: give one readout, or candidates separated by commas "
                           "(12ms,16ms,20ms)")
    if len(parts) > MAX_CANDIDATES:
        raise UsageProblem(f"--readout: at most {MAX_CANDIDATES} candidates in one still, not {len(parts)}")
    if len(set(parts)) != len(parts):
        raise UsageProblem(f"--readout {text!r}: a candidate is given twice")
    return parts


@app.command("preview")
def preview_command(
    clip: str = typer.Argument(..., help="Clip or numbered image sequence."),
    readout: str = typer.Option(..., "--readout", "-r", metavar="TIME",
                                help="Readout time (18.5ms, 0.0185s, 18500us), "
                                     "'auto', or a saved camera's name; several, "
                                     "separated by commas (12ms,16ms,20ms), to "
                                     "compare them side by side."),
    frame: Optional[str] = typer.Option(None, "--frame", "-n", metavar="FRAME",
                                        help="Frame to show: its number (a video's first frame is 1, a "
                                             "sequence's frames are its file numbers) or its timecode; "
                                             "default: the first frame used."),
    out: str = typer.Option(..., "--out", "-o", metavar="FILE.png", help="PNG file for the still."),
    frames: Optional[str] = frames_option(),
    line_order: Optional[str] = line_order_option(),
    reference_line: str = reference_line_option(),
    border: str = border_option(),
    fps: Optional[str] = typer.Option(None, "--fps", metavar="RATE", help="Frame rate of an image-sequence input."),
    force: bool = flag("--force", help="Replace OUT if it exists."),
    quiet: bool = flag("--quiet", "-q", help="No progress bar."),
    model: str = model_option(),
    hfov: Optional[str] = hfov_option(),
    focal_length: Optional[str] = focal_option(),
    lens_distortion: Optional[str] = distortion_option(),
):
    """Write a still of one frame as shot and corrected, with straight reference lines.

    Given several readouts (--readout 12ms,16ms,20ms), the still shows one corrected
    panel per readout beside the frame as shot, so a readout can be chosen by eye.
    """
    from skewfix.cameras import plan_readout
    from skewfix.files import write_whole
    from skewfix.framerange import delivered_position, first_frame_number, parse_frame, parse_frame_range
    from skewfix.motionfile import check_new_file
    from skewfix.pipeline import FrameWarper, RenderSettings, analyse
    from skewfix.preview import png_bytes, side_by_side
    from skewfix.rowclock import parse_rate
    from skewfix.warp import BORDERS

    if line_order is not None:
        choice(line_order, LINE_ORDERS, "--line-order")
    choice(reference_line, REFERENCE_LINES, "--reference-line")
    choice(border, BORDERS, "--border")
    if Path(out).suffix.lower() != ".png":
        raise UsageProblem(f"--out {out}: the still is written as PNG; give a .png name")
    frame = parse_frame(frame)
    selection = parse_frame_range(frames)
    check_new_file(out, force, "--out")
    check_distinct_outputs(clip, {"--out": out})
    rate = parse_rate(fps)
    request, lens = model_and_lens(model, hfov, focal_length, lens_distortion)
    candidates = candidate_readouts(readout)
    plans = [plan_readout(text, line_order, lens) for text in candidates]
    with TerminalProgress(quiet) as progress:
        analysis = analyse(clip, rate, progress=progress, frames=selection)
    info = analysis.info
    first = first_frame_number(info)
    index = 0 if frame is None else delivered_position(frame, info)
    if not 0 <= index < analysis.n_frames:
        used = f"{first} to {first + analysis.n_frames - 1}"
        raise InputError(f"{clip}: {'--frames ' + selection.text + ' uses' if selection else 'has'} "
                         f"{analysis.n_frames} frames ({used}); there is no frame {frame} among them")
    before = decoded_frame_at(clip, rate, index, selection)
    panels = [planes_to_rgb(before.planes, before.pix_fmt, info, 8)]
    labels, said = ["as shot"], []
    for text, plan in zip(candidates, plans):
        clock, solved = solve_with_model(analysis, plan, request)
        warper = FrameWarper(solved, clock, RenderSettings(reference_line, border), info)
        after, _ = warper.apply(index, before.planes, before.subsampling)
        panels.append(planes_to_rgb(after, before.pix_fmt, info, 8))
        ms = f"{round(clock.readout * 1e3, 3):g} ms"
        labels.append("corrected" if len(candidates) == 1 else f"readout {ms}")
        said.append((ms, clock.line_order, solved))
    write_whole(out, png_bytes(side_by_side(panels, labels)))
    for ms, _, solved in said:
        lead = "" if len(said) == 1 else f"readout {ms}: "
        typer.echo(f"note: {lead}motion model: {solved.kind.summary()}"
                   + (f" ({solved.model_reason})" if solved.model_reason else ""), err=True)
    if not quiet:
        shown = ", ".join(f"{ms}" for ms, _, _ in said)
        typer.echo(f"wrote {out} (frame {first + index}, readout {shown}, {said[0][1]})", err=True)
