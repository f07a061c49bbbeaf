"""`skewfix fix`: remove the rolling shutter from a clip or plate."""

from __future__ import annotations

from typing import Optional

import typer

from skewfix.cameras import plan_readout
from skewfix.cli import app
from skewfix.cli.options import (border_option, choice, codec_option, crf_option, distortion_option, flag,
                                 focal_option, frames_option, hfov_option, line_order_option, model_and_lens,
                                 model_option, preset_option, reference_line_option, whole_number)
from skewfix.cli.progress import TerminalProgress
from skewfix.rowclock import LINE_ORDERS, REFERENCE_LINES, parse_rate
from skewfix.warp import BORDERS

@app.command("fix")
def fix_command(
    input: str = typer.Argument(..., help="Clip or numbered image sequence (plate.%04d.tif) to correct."),
    output: str = typer.Argument(..., help="Where to write the corrected clip or sequence."),
    readout: str = typer.Option(..., "--readout", "-r", metavar="TIME",
                                help="Readout time (18.5ms, 0.0185s, 18500us; bare number = ms), "
                                     "'auto' to measure it from this clip, or a saved camera's name."),
    line_order: Optional[str] = line_order_option(),
    reference_line: str = reference_line_option(help="Row whose instant the corrected frame shows: middle, top "
                                                     "or bottom."),
    border: str = border_option(help="Fill for pixels with no source: edge, black or crop."),
    model: str = model_option(),
    hfov: Optional[str] = hfov_option(),
    focal_length: Optional[str] = focal_option(),
    lens_distortion: Optional[str] = distortion_option(),
    interpolation: str = typer.Option("cubic", "--interpolation", metavar="KERNEL",
                                      help="Resampling of luma/RGB: cubic (sharper, default) or linear (faster)."),
    codec: Optional[str] = codec_option(),
    crf: Optional[int] = crf_option("x264/x265 quality (default 16, visually lossless)."),
    preset: Optional[str] = preset_option(),
    frames: Optional[str] = frames_option(),
    fps: Optional[str] = typer.Option(None, "--fps", metavar="RATE",
                                      help="Frame rate of an image-sequence input (e.g. 24000/1001)."),
    depth: Optional[int] = typer.Option(None, "--depth", metavar="BITS", parser=whole_number,
                                        help="8 or 16 bits for PNG/TIFF output (default: as the source; "
                                             "10-bit video goes to 16); 16 (half) or 32 (float) for EXR."),
    save_motion: Optional[str] = typer.Option(None, "--save-motion", metavar="FILE.json",
                                              help="Write the solved motion (JSON)."),
    save_motion_csv: Optional[str] = typer.Option(None, "--save-motion-csv", metavar="FILE.csv",
                                                  help="Write one row per frame of motion and skew (CSV)."),
    save_maps: Optional[str] = typer.Option(None, "--save-maps", metavar="FOLDER",
                                            help="Folder for per-frame correct/reskew maps (float TIFF or EXR)."),
    map_format: str = typer.Option("tiff", "--map-format", metavar="FORMAT",
                                   help="Maps as tiff (32-bit float, x y 0) or exr "
                                        "(2-channel float: R is x, G is y)."),
    map_units: str = typer.Option("pixels", "--map-units", metavar="UNITS",
                                  help="Maps in pixels (absolute source position, origin top-left) or "
                                       "normalized (0-1 across the frame, origin bottom-left, y up)."),
    save_matte: Optional[str] = typer.Option(None, "--save-matte", metavar="PATTERN",
                                             help="Pattern (matte.%04d.png) for per-frame mattes of filled pixels."),
    report: Optional[str] = typer.Option(None, "--report", metavar="FILE.html",
                                         help="Write a self-contained HTML report."),
    force: bool = flag("--force", help="Replace OUTPUT (a sequence as a whole) and the other "
                                       "outputs if they exist."),
    quiet: bool = flag("--quiet", "-q", help="No progress bar."),
):
    """Remove rolling-shutter skew (lean, stretch, wobble) from INPUT and write OUTPUT.

    OUTPUT may be a numbered sequence (plate.%04d.tif: PNG, TIFF or OpenEXR): frames
    are numbered like an input sequence, or from 1 for a video input.
    """
    from skewfix.cli.deliverables import FixDeliverables
    from skewfix.framerange import parse_frame_range
    from skewfix.pipeline import FixOptions, fix_clip

    if line_order is not None:
        choice(line_order, LINE_ORDERS, "--line-order")
    choice(reference_line, REFERENCE_LINES, "--reference-line")
    choice(border, BORDERS, "--border")
    model, lens = model_and_lens(model, hfov, focal_length, lens_distortion)
    plan = plan_readout(readout, line_order, lens)
    resolver = plan.resolver
    options = FixOptions(readout=plan.seconds or 0.0, readout_origin=plan.origin, line_order=plan.line_order,
                         reference_line=reference_line, border=border, codec=codec, crf=crf,
                         preset=preset, force=force, fps=parse_rate(fps),
                         interpolation=choice(interpolation, ("cubic", "linear"), "--interpolation"),
                         model=model, lens=plan.lens, frames=parse_frame_range(frames))
    extras = FixDeliverables(input, output, motion=save_motion, motion_csv=save_motion_csv, maps_dir=save_maps,
                             matte=save_matte, report=report, reference_line=reference_line, border=border,
                             force=force, fps=options.fps,
                             sink_options=dict(codec=codec, crf=crf, preset=preset, depth=depth),
                             map_format=map_format, map_units=map_units)
    extras.check()
    try:
        with TerminalProgress(quiet) as progress:
            result = fix_clip(input, output, options, progress,
                              on_frame=extras.on_frame if extras.wants_frames else None,
                              readout_resolver=resolver, sink_factory=extras.sink_factory)
    except BaseException:
        extras.discard()
        raise
    written = extras.finish(result)
    say = (lambda *_: None) if quiet else (lambda m: typer.echo(m, err=True))
    say(f"readout {result.readout * 1e3:.3f} ms ({result.line_order}, {result.readout_origin})")
    for note in result.notes:
        typer.echo(f"note: {note}", err=True)
    part = ""
    if options.frames is not None:
        from skewfix.framerange import first_frame_number

        first = first_frame_number(result.info)
        part = f" (frames {first} to {first + result.frames_written - 1} of {input})"
    say(f"wrote {result.frames_written} frames to {result.output}{part}")
    for line in written:
        say(f"wrote {line}")
