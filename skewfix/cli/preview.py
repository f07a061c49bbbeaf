"""`skewfix preview`: one before/after still, rendering only that frame."""

from __future__ import annotations

from pathlib import Path
from typing import Optional

import typer

from skewfix.cli import app
from skewfix.cli.deliverables import check_distinct_outputs, decoded_frame_at, frame_index, solve_with_model, still_png
from skewfix.cli.options import choice, distortion_option, focal_option, hfov_option, model_and_lens, model_option
from skewfix.cli.progress import TerminalProgress
from skewfix.errors import UsageProblem
from skewfix.rowclock import LINE_ORDERS, REFERENCE_LINES
from skewfix.sequence import first_frame_number, planes_to_rgb


@app.command("preview")
def preview_command(
    clip: str = typer.Argument(..., help="Clip or numbered image sequence."),
    readout: str = typer.Option(..., "--readout", "-r", help="Readout time (18.5ms, 0.0185s, 18500us), "
                                                              "'auto', or a saved camera's name."),
    frame: Optional[int] = typer.Option(None, "--frame", "-n", help="Frame to show, by its number: a sequence's "
                                                                     "file number, a video's counted from 1 "
                                                                     "(default: the first frame)."),
    out: str = typer.Option(..., "--out", "-o", help="PNG file for the before/after still."),
    line_order: Optional[str] = typer.Option(None, "--line-order", help="top-down (default) or bottom-up."),
    reference_line: str = typer.Option("middle", "--reference-line", help="middle, top or bottom."),
    border: str = typer.Option("edge", "--border", help="edge, black or crop."),
    fps: Optional[str] = typer.Option(None, "--fps", help="Frame rate of an image-sequence input."),
    force: bool = typer.Option(False, "--force", help="Replace OUT if it exists."),
    quiet: bool = typer.Option(False, "--quiet", "-q", help="No progress bar."),
    model: str = model_option(),
    hfov: Optional[str] = hfov_option(),
    focal_length: Optional[str] = focal_option(),
    lens_distortion: Optional[str] = distortion_option(),
):
    """Write a before/after still of one frame, with straight reference lines over both halves."""
    from skewfix.cameras import plan_readout
    from skewfix.rowclock import parse_rate
    from skewfix.files import write_whole
    from skewfix.motionfile import check_new_file
    from skewfix.pipeline import FrameWarper, RenderSettings, analyse
    from skewfix.warp import BORDERS

    if line_order is not None:
        choice(line_order, LINE_ORDERS, "--line-order")
    choice(reference_line, REFERENCE_LINES, "--reference-line")
    choice(border, BORDERS, "--border")
    if Path(out).suffix.lower() != ".png":
        raise UsageProblem(f"--out {out}: the still is written as PNG; give a .png name")
    check_new_file(out, force, "--out")
    check_distinct_outputs(clip, {"--out": out})
    rate = parse_rate(fps)
    request, lens = model_and_lens(model, hfov, focal_length, lens_distortion)
    plan = plan_readout(readout, line_order, lens)
    with TerminalProgress(quiet) as progress:
        analysis = analyse(clip, rate, progress=progress)
    index = frame_index(clip, analysis.info, analysis.n_frames, frame)
    clock, solved = solve_with_model(analysis, plan, request)
    warper = FrameWarper(solved, clock, RenderSettings(reference_line, border), analysis.info)
    before = decoded_frame_at(clip, rate, index)
    after, _ = warper.apply(index, before.planes, before.subsampling)
    info = analysis.info
    png = still_png(planes_to_rgb(before.planes, before.pix_fmt, info, 8),
                    planes_to_rgb(after, before.pix_fmt, info, 8))
    write_whole(out, png)
    typer.echo(f"note: motion model: {solved.kind.summary()}"
               + (f" ({solved.model_reason})" if solved.model_reason else ""), err=True)
    if not quiet:
        typer.echo(f"wrote {out} (frame {index + first_frame_number(info)}, readout {clock.readout * 1e3:.3f} ms, {clock.line_order})",
                   err=True)
