"""`skewfix cameras`: list, show and remove saved cameras (measured readouts kept by name)."""

from __future__ import annotations

import typer

from skewfix.cli import app

cameras_app = typer.Typer(
    no_args_is_help=True,
    add_completion=False,
    help="Saved cameras: readouts measured with 'skewfix measure --save-camera NAME', "
         "used by 'skewfix fix --readout NAME'.",
)


def _readout_text(camera) -> str:
    text = f"{camera.readout_s * 1e3:.3f}"
    if camera.uncertainty_s is not None:
        text += f" ± {camera.uncertainty_s * 1e3:.3f}"
    return text + " ms"


@cameras_app.command("list")
def list_command():
    """One line per saved camera: name, readout, line order, measured mode, method, date."""
    from skewfix.cameras import cameras_dir, list_cameras

    problems: list = []
    cameras = list_cameras(problems)
    if not cameras and not problems:
        typer.echo(f"no saved cameras in {cameras_dir()} (save one with: "
                   "skewfix measure CLIP --save-camera NAME)")
        return
    rows = [("name", "readout", "line order", "measured mode", "method", "measured on")]
    for c in cameras:
        rows.append((c.name, _readout_text(c), c.line_order, c.mode_text(), c.method or "-",
                     (c.measured or "-")[:10]))
    widths = [max(len(r[i]) for r in rows) for i in range(len(rows[0]))]
    for r in rows:
        typer.echo("  ".join(cell.ljust(w) for cell, w in zip(r, widths)).rstrip())
    for name, message in problems:
        typer.echo(f"skewfix: {message}", err=True)


@cameras_app.command("show")
def show_command(name: str = typer.Argument(..., help="A saved camera's name.")):
    """Everything saved for one camera, and where its file is."""
    from skewfix.cameras import load_camera

    c = load_camera(name)
    fields = [
        ("name", c.name),
        ("readout", _readout_text(c)),
        ("line delay", f"{c.line_delay_s * 1e6:.4f} µs per row" if c.line_delay_s is not None else "-"),
        ("line order", c.line_order),
        ("measured mode", c.mode_text()),
        ("method", c.method or "-"),
        ("measured on", c.measured or "-"),
        ("test clip", c.clip or "-"),
        ("lens", c.lens_text()),
        ("file", str(c.path)),
    ]
    width = max(len(k) for k, _ in fields)
    for key, value in fields:
        typer.echo(f"{key.ljust(width)}  {value}")
    for note in c.notes:
        typer.echo(f"{'note'.ljust(width)}  {note}")


@cameras_app.command("remove")
def remove_command(name: str = typer.Argument(..., help="The saved camera to delete.")):
    """Delete a saved camera."""
    from skewfix.cameras import remove_camera

    path = remove_camera(name)
    typer.echo(f"removed saved camera '{name}' ({path})")


app.add_typer(cameras_app, name="cameras")
