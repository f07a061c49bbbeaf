"""`skewfix batch`: run `fix` over a folder of clips or a clip list (the list's format is in
`skewfix.batch`'s docstring and the README's "Many clips")."""

from __future__ import annotations

import os
from typing import Optional

import typer

from skewfix.cli import app, fail
from skewfix.cli.options import (border_option, codec_option, crf_option, distortion_option, flag, focal_option,
                                 hfov_option, line_order_option, model_option, preset_option, reference_line_option,
                                 whole_number)
from skewfix.errors import UsageProblem


def default_workers() -> int:
    """Half the cores: each clip already keeps a decoder, OpenCV and an encoder busy."""
    return max(1, (os.cpu_count() or 2) // 2)


def _seconds(value: float | None) -> str:
    return "" if value is None else f"{value:.1f}"


def shown_output(output: str, out_dir: str) -> str:
    """An output's path as the table shows it: relative to ``--out`` when inside it."""
    try:
        relative = os.path.relpath(output, os.path.abspath(out_dir))
    except ValueError:  # another drive (Windows)
        return output
    return output if relative.startswith(os.pardir) else relative


def print_summary(outcomes, out_dir: str = ".") -> None:
    """The end-of-batch table on stdout: clip, output, status, frames, seconds, message."""
    from rich.console import Console
    from rich.table import Table

    table = Table(title=None, show_lines=False)
    for name, justify in (("clip", "left"), ("output", "left"), ("status", "left"), ("frames", "right"),
                          ("seconds", "right"), ("message", "left")):
        table.add_column(name, justify=justify, overflow="fold")
    for o in outcomes:
        table.add_row(o.name, shown_output(o.output, out_dir), o.status, "" if o.frames is None else str(o.frames),
                      _seconds(o.seconds), o.message)
    Console(width=max(100, Console().width), highlight=False).print(table)


@app.command("batch")
def batch_command(
    source: str = typer.Argument(..., metavar="FOLDER_OR_LIST",
                                 help="A folder (every video file in it) or a clip list: a text file with one "
                                      "clip a line, INPUT [OUTPUT] [setting=value ...], the settings "
                                      "being fix's options (readout=21.3ms line-order=bottom-up ...)."),
    out: str = typer.Option(..., "--out", "-o", metavar="FOLDER",
                            help="Folder for the corrected clips (made if missing)."),
    readout: Optional[str] = typer.Option(None, "--readout", "-r", metavar="TIME",
                                          help="Readout for clips whose line gives none (as for fix)."),
    line_order: Optional[str] = line_order_option(),
    reference_line: Optional[str] = reference_line_option(None),
    border: Optional[str] = border_option(None),
    codec: Optional[str] = codec_option(),
    crf: Optional[int] = crf_option(),
    preset: Optional[str] = preset_option(),
    model: Optional[str] = model_option(None),
    hfov: Optional[str] = hfov_option(),
    focal_length: Optional[str] = focal_option(),
    lens_distortion: Optional[str] = distortion_option(),
    workers: Optional[int] = typer.Option(None, "--workers", "-j", metavar="N", parser=whole_number,
                                          help="Clips corrected at once on this machine (default: half the cores)."),
    scheduler: Optional[str] = typer.Option(None, "--scheduler", metavar="ADDRESS",
                                            help="Address of a Dask scheduler (tcp://host:8786): one task per clip."),
    force: bool = flag("--force", help="Correct every clip again, replacing outputs that exist."),
    quiet: bool = flag("--quiet", "-q", help="No line per finished clip; only the summary."),
):
    """Correct many clips: locally in worker processes or on a Dask cluster; reruns skip finished clips."""
    from skewfix.batch import run_batch

    if workers is not None and workers < 1:
        raise UsageProblem(f"--workers must be at least 1, not {workers}")
    if workers is not None and scheduler is not None:
        raise UsageProblem("--workers and --scheduler exclude each other (the cluster decides)")
    defaults = {"readout": readout, "line-order": line_order, "reference-line": reference_line,
                "border": border, "codec": codec, "crf": None if crf is None else str(crf), "preset": preset,
                "model": model, "hfov": hfov, "focal-length": focal_length, "lens-distortion": lens_distortion}

    def announce(outcome):
        if quiet:
            return
        detail = (f"{outcome.frames} frames, {_seconds(outcome.seconds)} s -> {shown_output(outcome.output, out)}"
                  if outcome.status == "done" else outcome.message)
        typer.echo(f"{outcome.status:>7}  {outcome.name}: {detail}", err=True)
        for note in outcome.notes:  # fix's own notes and warnings, whole
            typer.echo(f"         note: {note}", err=True)

    outcomes = run_batch(source, out, defaults, workers or default_workers(), scheduler, force, announce)
    print_summary(outcomes, out)
    failed = sum(o.status == "failed" for o in outcomes)
    if failed:
        fail(f"{failed} of {len(outcomes)} clip(s) failed")
