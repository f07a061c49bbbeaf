"""Plots to check a readout measurement by eye.

`plot_residual_curve` draws any estimate whose diagnostics hold
``candidates_ms`` (candidate readouts, ms) and ``residuals`` (the fit's
misfit at each), with the result and its one-sigma band marked; an optional
``residual_label`` names the misfit's unit.
"""

from __future__ import annotations

import numpy as np

from skewfix.measure.result import ReadoutEstimate


def new_figure(rows: int, figsize: tuple[float, float]):
    """A figure with ``rows`` stacked axes, drawn off screen.

    Built without pyplot, so the caller's matplotlib backend (a notebook's,
    say) is left alone.
    """
    from matplotlib.figure import Figure

    fig = Figure(figsize=figsize, constrained_layout=True)
    return fig, fig.subplots(rows, 1)


def save_png(fig, path) -> None:
    """Every measurement plot is a PNG, whatever the file is called."""
    fig.savefig(str(path), dpi=100, format="png")


def draw_residual_curve(ax, estimate: ReadoutEstimate) -> None:
    """Misfit against candidate readout on a matplotlib axis, minimum and result marked."""
    d = estimate.diagnostics or {}
    if "candidates_ms" not in d or "residuals" not in d:
        raise ValueError(f"the {estimate.method} estimate has no residual curve to plot")
    cand = np.asarray(d["candidates_ms"], dtype=np.float64)
    res = np.asarray(d["residuals"], dtype=np.float64)
    ax.plot(cand, res, color="C0", lw=1.5)
    finite = np.isfinite(res)
    if finite.any():
        i = int(np.nanargmin(np.where(finite, res, np.nan)))
        ax.plot(cand[i], res[i], "v", color="C3", ms=9, label=f"minimum at {cand[i]:.3f} ms")
    r_ms, s_ms = estimate.readout_s * 1e3, estimate.uncertainty_s * 1e3
    ax.axvline(r_ms, color="C3", ls="--", lw=1, label=f"result {r_ms:.3f} ± {s_ms:.3f} ms")
    if np.isfinite(s_ms) and s_ms > 0:
        ax.axvspan(r_ms - s_ms, r_ms + s_ms, color="C3", alpha=0.12)
    ax.set_xlabel("candidate readout (ms)")
    ax.set_ylabel(d.get("residual_label", "fit residual"))
    ax.legend(loc="best", fontsize=8)


def plot_residual_curve(estimate: ReadoutEstimate, path) -> None:
    """Write a PNG of the misfit against candidate readout (pan, motion)."""
    fig, ax = new_figure(1, (9, 4.5))
    draw_residual_curve(ax, estimate)
    ax.set_title(f"{estimate.method}: readout {estimate.readout_s * 1e3:.3f} ± "
                 f"{estimate.uncertainty_s * 1e3:.3f} ms, {estimate.line_order}, "
                 f"{len(estimate.frames_used)} frames")
    save_png(fig, path)
