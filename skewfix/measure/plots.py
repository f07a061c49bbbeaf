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


def draw_residual_curve(ax, estimate: ReadoutEstimate, window=None) -> None:
    """Misfit against candidate readout on a matplotlib axis, minimum and result marked
    (``window``: (centre, half width) in ms to draw only the candidates there)."""
    d = estimate.diagnostics or {}
    if "candidates_ms" not in d or "residuals" not in d:
        raise ValueError(f"the {estimate.method} estimate has no residual curve to plot")
    cand = np.asarray(d["candidates_ms"], dtype=np.float64)
    res = np.asarray(d["residuals"], dtype=np.float64)
    if window is not None:  # a close look: only the candidates within the window
        keep = np.abs(cand - window[0]) <= window[1]
        cand, res = cand[keep], res[keep]
    ax.plot(cand, res, color="C0", lw=1.5, marker="." if window is not None else None)
    finite = np.isfinite(res)
    s_ms = estimate.uncertainty_s * 1e3
    # the motion method searches a signed readout (negative: bottom-up); mark the result there
    r_ms = float(d.get("signed_best_ms", estimate.readout_s * 1e3))
    if finite.any():
        i = int(np.nanargmin(np.where(finite, res, np.nan)))
        step = float(np.min(np.diff(np.unique(cand)))) if len(np.unique(cand)) > 1 else 0.0
        if abs(cand[i] - r_ms) <= max(0.5 * step, 1e-6):
            label = f"lowest misfit at {cand[i]:.3f} ms (the result)"
        else:  # said plainly rather than hidden: the result is not the lowest point drawn
            label = f"lowest candidate at {cand[i]:.3f} ms (not the result: see the method)"
        ax.plot(cand[i], res[i], "v", color="C3", ms=9, label=label)
    ax.axvline(r_ms, color="C3", ls="--", lw=1, label=f"result {abs(r_ms):.3f} ± {s_ms:.3f} ms")
    if np.isfinite(s_ms) and s_ms > 0:
        ax.axvspan(r_ms - s_ms, r_ms + s_ms, color="C3", alpha=0.12)
    ax.set_xlabel("candidate readout (ms)" + (", negative: bottom-up" if "signed_best_ms" in d else ""))
    ax.set_ylabel(d.get("residual_label", "fit residual"))
    ax.legend(loc="best", fontsize=8)


def plot_residual_curve(estimate: ReadoutEstimate, path, refused: str | None = None) -> None:
    """Write a PNG of the misfit against candidate readout (pan, motion), with a close look
    around the result; ``refused`` marks a measurement that was refused, with the reason."""
    d = estimate.diagnostics or {}
    close = "signed_best_ms" in d
    fig, axes = new_figure(2 if close else 1, (9, 8 if close else 4.5))
    axes = np.atleast_1d(axes)
    draw_residual_curve(axes[0], estimate)
    if close:
        centre = float(d["signed_best_ms"])
        sigma_ms = estimate.uncertainty_s * 1e3
        half = max(6.0 * sigma_ms if np.isfinite(sigma_ms) else 0.0, 3.6 * float(d.get("finest_step_ms", 0.5)))
        draw_residual_curve(axes[1], estimate, (centre, half))
        axes[1].set_title("close to the minimum", loc="left", fontsize=10)
    axes[0].set_title(title_for(estimate, refused))
    mark_refused(fig, refused)
    save_png(fig, path)


def title_for(estimate: ReadoutEstimate, refused: str | None = None) -> str:
    """The plot's title: the result, or that there is none."""
    if refused:
        return (f"{estimate.method}: REFUSED (no readout reported); the best candidate was "
                f"{estimate.readout_s * 1e3:.3f} ms")
    return (f"{estimate.method}: readout {estimate.readout_s * 1e3:.3f} ± "
            f"{estimate.uncertainty_s * 1e3:.3f} ms, {estimate.line_order}, "
            f"{len(estimate.frames_used)} frames")


def mark_refused(fig, refused: str | None) -> None:
    """Stamp a refused measurement's figure, with the reason wrapped under it."""
    if not refused:
        return
    import textwrap

    fig.text(0.5, 0.5, "REFUSED", fontsize=60, color="C3", alpha=0.25, ha="center", va="center",
             rotation=20, weight="bold")
    fig.text(0.01, 0.005, "\n".join(textwrap.wrap("refused: " + refused, 150)), fontsize=7, color="C3",
             ha="left", va="bottom")


def plot_refusal(reason: str, path) -> None:
    """A PNG for a refusal with nothing to draw (no bands, no tracks): the reason, marked."""
    fig, ax = new_figure(1, (9, 4.5))
    ax.axis("off")
    ax.set_title("measurement refused", loc="left")
    mark_refused(fig, reason)
    save_png(fig, path)
