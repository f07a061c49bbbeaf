"""`skewfix reskew`: put the rolling shutter of a saved motion file back onto a clean clip or
sequence (CG, a corrected plate) of the same frame count, the plate's size or larger
(centred overscan, `skewfix.overscan`)."""

from __future__ import annotations

from typing import Optional

import typer

from skewfix.cli import app
from skewfix.cli.deliverables import check_distinct_outputs, check_output_options, count_frames
from skewfix.cli.options import border_option, choice, codec_option, crf_option, flag, whole_number
from skewfix.cli.progress import TerminalProgress
from skewfix.errors import InputError, RuntimeProblem, UsageProblem
from skewfix.sequence import check_float_output, check_sequence_output, is_pattern, open_sink

RESKEW_BORDERS = ("edge", "black")


@app.command("reskew")
def reskew_command(
    input: str = typer.Argument(..., help="Clean clip or numbered sequence (CG, a corrected plate)."),
    output: str = typer.Argument(..., help="Where to write the clip or sequence with the rolling shutter put back."),
    motion: str = typer.Option(..., "--motion", "-m", metavar="FILE.json",
                               help="Motion file written by 'fix --save-motion'."),
    codec: Optional[str] = codec_option("h264, hevc, prores or ffv1 for video output (default: as the input)."),
    crf: Optional[int] = crf_option(),
    fps: Optional[str] = typer.Option(None, "--fps", metavar="RATE",
                                      help="Frame rate of a sequence input (default: the motion file's)."),
    depth: Optional[int] = typer.Option(None, "--depth", metavar="BITS", parser=whole_number,
                                        help="8 or 16 bits for PNG/TIFF output (default: as "
                                             "the input; deeper than 8 goes to 16); 16 (half) "
                                             "or 32 (float) for EXR."),
    border: str = border_option(help="Fill for pixels with no source: edge or black."),
    overscan: Optional[str] = typer.Option(None, "--overscan", metavar="1.1|96px|96,54px",
                                           help="INPUT is larger than the plate, centred on it: by a factor "
                                                "(1.1) or a margin on each side in pixels; OUTPUT keeps INPUT's size."),
    force: bool = flag("--force", help="Replace OUTPUT if it exists (a sequence as a whole)."),
    quiet: bool = flag("--quiet", "-q", help="No progress bar."),
):
    """Put the rolling shutter of a saved motion file back onto INPUT and write OUTPUT.

    INPUT has the plate's frame count and size, or is larger and centred on the plate
    with --overscan (CG rendered with overscan); OUTPUT keeps INPUT's size.
    """
    from skewfix.rowclock import parse_rate
    from skewfix.decode import open_source
    from skewfix.encode import DeferredSink, check_output_path
    from skewfix.motionfile import load_motion
    from skewfix.overscan import OverscanReskewWarper, clean_frame_margins, parse_overscan
    from skewfix.pipeline import RenderSettings, render

    choice(border, RESKEW_BORDERS, "--border")
    asked_overscan = parse_overscan(overscan)
    check_output_options(output, {"codec": codec, "crf": crf, "depth": depth})
    model, clock, reference_line, meta = load_motion(motion)
    check_output_path(input, output, force)
    if is_pattern(output):
        check_sequence_output(input, output, force)
    check_distinct_outputs(input, {"OUTPUT": output, "--motion": motion})
    check_float_output(input, output)
    rate = parse_rate(fps) or meta["frame_rate"]
    if is_pattern(input) and rate is None:
        raise UsageProblem(f"{input}: give the sequence's frame rate with --fps (the motion file has none)")
    source = open_source(input, rate)  # opened once: checked here, then streamed by the render
    try:
        info = source.info
        margins = clean_frame_margins(asked_overscan, (model.width, model.height), (info.width, info.height),
                                      input, motion)
        expected = len(clock.frame_times)
        found = count_frames(input, info)
        if found != expected:
            raise InputError(f"{input}: has {found} frames but the motion in {motion} covers {expected}; "
                             "reskew needs the same frame count")
    except BaseException:
        source.close()
        raise
    warper = OverscanReskewWarper(model, clock, RenderSettings(reference_line, border, direction="reskew"), info,
                                  margins)

    def open_output():
        # with the first picture, when the first frame has told the display rotation
        with source.io_lock:  # the decoding thread may be demuxing the template
            return open_sink(input, output, source.info, codec=codec, crf=crf, depth=depth, force=force,
                             template=getattr(source, "container", None))

    sink = DeferredSink(open_output)
    try:
        with TerminalProgress(quiet) as progress:
            written = render(input, sink, warper, rate, progress, source=source)
        if written != expected:
            raise RuntimeProblem(f"{input}: {written} frames could be read of {expected}; nothing was written")
        sink.finish()
    except BaseException:
        sink.abort()
        raise
    for note in sink.notes:
        typer.echo(f"note: {note}", err=True)
    if not quiet:
        typer.echo(f"rolling shutter put back ({clock.readout * 1e3:.3f} ms, {clock.line_order}); "
                   f"wrote {written} frames to {output}", err=True)
