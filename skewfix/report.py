"""`fix --report`: one self-contained HTML page about a correction.

The page carries everything inline (PNG plots as base64 ``data:`` URIs, CSS in
a ``<style>`` element, no scripts, nothing fetched): the readout used and where
it came from, the motion curves over time, the skew removed per frame, a
before/after still and the notes. Plots are drawn with matplotlib's Agg
canvas (no pyplot state, no display needed).
"""

from __future__ import annotations

import base64
import html
import io
import os
from dataclasses import dataclass, field

import numpy as np

from skewfix.motion import MotionModel
from skewfix.files import write_whole
from skewfix.rowclock import RowClock

SAMPLES_PER_KNOT = 3


@dataclass
class ReportContent:
    """What the page shows beyond the `FixResult` itself."""

    reference_line: str
    border: str
    skew: np.ndarray  # (n_frames, 2): skew_x_px, skew_y_px
    still_png: bytes | None = None
    still_frame: int | None = None  # the still's frame number
    first_number: int = 1  # the number of the first frame (README: frame numbers)
    outputs: list[tuple[str, str]] = field(default_factory=list)  # (what, path)


def _figure(height_in: float):
    from matplotlib.backends.backend_agg import FigureCanvasAgg
    from matplotlib.figure import Figure

    fig = Figure(figsize=(8.0, height_in), dpi=100)
    FigureCanvasAgg(fig)
    return fig


def _png(fig) -> bytes:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", bbox_inches="tight")
    return buf.getvalue()


def motion_plot_png(model: MotionModel, clock: RowClock, cuts=()) -> bytes:
    """The model's curves in units people read (pan in px, angles in degrees...) against
    time, one line per shot."""
    labels = tuple(model.kind.describe(np.zeros((model.kind.n_curves, 1))))
    fig = _figure(1.6 * len(labels))
    axes = fig.subplots(len(labels), 1, sharex=True)
    interval = clock.median_interval() if len(clock.frame_times) > 1 else 0.04
    for seg in model.segments:
        t0 = clock.frame_times[seg.first_frame]
        t1 = clock.frame_times[seg.last_frame] + (interval if np.isfinite(interval) else 0.04)
        n = max(8, int(np.ceil((t1 - t0) / seg.knot_spacing * SAMPLES_PER_KNOT)))
        t = np.linspace(t0, t1, n)
        for ax, values in zip(axes, model.kind.describe(seg.evaluate(t)).values()):
            ax.plot(t, values, color="#1f5f8b", linewidth=1.2)
    for ax, label in zip(axes, labels):
        ax.set_ylabel(label, fontsize=8)
        ax.tick_params(labelsize=7)
        ax.grid(True, alpha=0.3)
        for k in cuts:
            ax.axvline(clock.frame_times[k + 1], color="#b03a2e", linewidth=0.8, linestyle="--")
    axes[-1].set_xlabel("time (s)", fontsize=8)
    axes[0].set_title(f"solved camera motion, {model.kind.summary()} (dashed: cuts)", fontsize=9)
    return _png(fig)


def skew_plot_png(skew: np.ndarray, first_number: int = 1) -> bytes:
    """Per-frame skew removed: horizontal lean and vertical stretch, px, against the frame numbers."""
    fig = _figure(2.6)
    ax = fig.subplots()
    frames = first_number + np.arange(len(skew))
    ax.plot(frames, skew[:, 0], marker="o", markersize=2.5, linewidth=1.2, color="#1f5f8b",
            label="lean: bottom row vs top row, x (px)")
    ax.plot(frames, skew[:, 1], marker="s", markersize=2.5, linewidth=1.0, color="#c27c0e",
            label="stretch: extra height, y (px)")
    ax.axhline(0, color="black", linewidth=0.6)
    ax.set_xlabel("frame", fontsize=8)
    ax.set_ylabel("skew removed (px)", fontsize=8)
    ax.tick_params(labelsize=7)
    ax.grid(True, alpha=0.3)
    ax.legend(fontsize=7, loc="best")
    return _png(fig)


def _img(png: bytes, alt: str) -> str:
    data = base64.b64encode(png).decode("ascii")
    return f'<img alt="{html.escape(alt)}" src="data:image/png;base64,{data}">'


_STYLE = """
body { font-family: sans-serif; margin: 2em auto; max-width: 60em; color: #222; background: #fafafa; }
h1 { font-size: 1.4em; margin-bottom: 0.2em; }
h2 { font-size: 1.1em; margin-top: 1.6em; border-bottom: 1px solid #ccc; }
table { border-collapse: collapse; }
td { padding: 0.2em 1.2em 0.2em 0; vertical-align: top; }
td:first-child { color: #666; }
.readout { font-size: 1.3em; padding: 0.5em 0.8em; background: #e8f0f6; display: inline-block; }
img { max-width: 100%; border: 1px solid #ddd; background: white; }
li { margin: 0.2em 0; }
"""


def report_html(result, content: ReportContent) -> str:
    """The page as a string. ``result`` is a `skewfix.pipeline.FixResult`."""
    e = html.escape
    info, clock, model = result.info, result.clock, result.model
    interval = info.frame_interval or clock.median_interval()
    rate = f"{float(info.rate):.3f} fps ({info.rate.numerator}/{info.rate.denominator})" if info.rate else "unknown"
    fraction = f", {result.readout / interval * 100:.1f} % of the frame interval" if interval else ""
    skew = content.skew
    worst = int(np.argmax(np.abs(skew[:, 0]) + np.abs(skew[:, 1]))) if len(skew) else 0
    facts = [
        ("input", info.path),
        ("output", result.output),
        ("frame size", f"{info.width} × {info.height} (stored rows)"),
        ("frames", f"{result.frames_written} written"),
        ("frame rate", rate),
        ("line order", result.line_order),
        ("line delay", f"{clock.line_delay * 1e6:.3f} µs per row"),
        ("reference line", f"{content.reference_line} (the instant each corrected frame shows)"),
        ("border", content.border),
        ("motion model", model.kind.summary() + (f" — {model.model_reason}" if model.model_reason else "")),
        ("shots", f"{len(model.segments)} ({len(model.cuts)} cut(s))"),
        ("unmeasured frame pairs", str(len(model.unmeasured_pairs))),
        ("tracks kept by the fit", f"{model.inlier_fraction * 100:.0f} %"),
        ("largest skew removed", f"{skew[worst, 0]:+.2f} px lean, {skew[worst, 1]:+.2f} px stretch "
                                 f"(frame {content.first_number + worst})" if len(skew) else "none"),
    ]
    facts += [(what, path) for what, path in content.outputs]
    rows = "\n".join(f"<tr><td>{e(k)}</td><td>{e(str(v))}</td></tr>" for k, v in facts)
    notes = "\n".join(f"<li>{e(n)}</li>" for n in result.notes) or "<li>none</li>"
    still = ""
    if content.still_png:
        still = (f"<h2>Before and after (frame {content.still_frame})</h2>\n"
                 f"<p>Straight reference lines are drawn over both halves.</p>\n"
                 f"{_img(content.still_png, f'frame {content.still_frame} as shot and corrected')}")
    motion = _img(motion_plot_png(model, clock, model.cuts), "solved camera motion over time")
    skew_img = _img(skew_plot_png(skew, content.first_number), "skew removed per frame")
    return f"""<!DOCTYPE html>
<html lang="en">
<head>
<meta charset="utf-8">
<title>skewfix report: {e(os.path.basename(str(info.path)))}</title>
<style>{_STYLE}</style>
</head>
<body>
<h1>Rolling-shutter correction report</h1>
<p>{e(str(info.path))} → {e(str(result.output))}</p>
<h2>Readout</h2>
<p class="readout">{result.readout * 1e3:.3f} ms, {e(result.line_order)}{e(fraction)}</p>
<p>Where it came from: {e(result.readout_origin)}.</p>
<h2>Clip</h2>
<table>
{rows}
</table>
<h2>Notes and warnings</h2>
<ul>
{notes}
</ul>
<h2>Motion</h2>
{motion}
<h2>Skew removed per frame</h2>
<p>Lean: how far the bottom row sat to the right of the top row in the input (a vertical edge's slant across
the frame). Stretch: how much taller the input picture was than the corrected one.</p>
{skew_img}
{still}
</body>
</html>
"""


def write_report(path: str | os.PathLike, result, content: ReportContent):
    """Write the report page whole (temporary name, then rename)."""
    return write_whole(path, report_html(result, content))
