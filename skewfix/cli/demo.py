"""`skewfix demo`: render an invented whip pan, correct it, and show before/after."""

from __future__ import annotations

from fractions import Fraction
from pathlib import Path

import typer

from skewfix.cli import app
from skewfix.cli.options import flag
from skewfix.cli.progress import TerminalProgress
from skewfix.framerange import VIDEO_FIRST_NUMBER

DEMO_READOUT = 0.0185
DEMO_RATE = Fraction(25)


def read_frame_rgb(path: str, index: int):
    import av

    with av.open(path) as c:
        for i, frame in enumerate(c.decode(video=0)):
            if i == index:
                return frame.to_ndarray(format="rgb24")
    raise IndexError(index)


def render_demo_clip(path: Path) -> None:
    """A 2-second whip pan along an invented harbour front (960x540, 25 fps)."""
    from skewfix.synth.paths import WhipPan
    from skewfix.synth.scenes import harbour_scene
    from skewfix.synth.shutter import render_clip

    width, height = 960, 540
    scene = harbour_scene(int(height * 1.3), 7000)
    render_clip(path, scene, WhipPan(peak_px_s=3800.0, centre_s=1.0, duration_s=1.2, tilt_px_s=8.0),
                width, height, DEMO_RATE, 50, DEMO_READOUT, origin=(500 + width / 2, height * 0.65), crf=14, audio=True)


@app.command("demo")
def demo_command(
    folder: Path = typer.Option(Path("clips"), "--folder", metavar="FOLDER",
                                help="Where the demo clip and results go."),
    quiet: bool = flag("--quiet", "-q", help="No progress bar."),
):
    """Render a demo whip pan (an invented harbour), correct it, write a before/after still."""
    from skewfix.pipeline import FixOptions, fix_clip
    from skewfix.preview import before_after

    folder.mkdir(parents=True, exist_ok=True)
    clip = folder / "demo_harbour_whip_pan.mp4"
    fixed = folder / "demo_harbour_whip_pan_corrected.mp4"
    still = folder / "demo_before_after.png"
    if not clip.exists():
        typer.echo(f"rendering the demo clip (rolling shutter, readout {DEMO_READOUT * 1e3:.1f} ms) ...", err=True)
        render_demo_clip(clip)
    with TerminalProgress(quiet) as progress:
        result = fix_clip(str(clip), str(fixed), FixOptions(readout=DEMO_READOUT, force=True), progress)
    k = 25  # position of the fastest moment of the pan (counted from 0; shown as a frame number)
    before_after(read_frame_rgb(str(clip), k), read_frame_rgb(str(fixed), k), str(still))
    typer.echo(f"demo clip (as shot):   {clip}")
    typer.echo(f"corrected clip:        {fixed}  ({result.frames_written} frames, readout {DEMO_READOUT * 1e3:.1f} ms)")
    typer.echo(f"before/after still:    {still}  (frame {k + VIDEO_FIRST_NUMBER}; the masts lean on the left, stand straight on the right)")
