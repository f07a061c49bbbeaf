"""Command-line options shared by several commands: checked choices, whole numbers, the encoder,
the motion model and the lens."""

from __future__ import annotations

from typing import Optional

import typer

from skewfix.errors import UsageProblem


def choice(value: str, allowed, option: str) -> str:
    """``value`` when it is one of ``allowed``; else a `UsageProblem` naming ``option``."""
    if value not in allowed:
        raise UsageProblem(f"{option} must be one of {', '.join(allowed)}, not {value!r}")
    return value


def whole_number(value: str) -> int:
    """typer ``parser`` for an option that takes a whole number (--crf, --depth, --workers): the
    error names the value in skewfix's words rather than the type checker's."""
    try:
        return int(value)
    except ValueError:
        raise typer.BadParameter(f"must be a whole number, not {value!r}") from None


def flag(*names: str, help: str):
    """An on/off option (False unless given). Its help shows no value placeholder: typer would
    print ``<bool>``, as if the flag took a value."""
    return typer.Option(False, *names, help=help, metavar="")


# The row timing and the border, shared by fix, preview, batch and reskew.
def line_order_option():
    return typer.Option(None, "--line-order", metavar="ORDER", help="top-down (default) or bottom-up.")


def reference_line_option(default: Optional[str] = "middle", help: str = "middle, top or bottom."):
    return typer.Option(default, "--reference-line", metavar="ROW", help=help)


def border_option(default: Optional[str] = "edge", help: str = "edge, black or crop."):
    return typer.Option(default, "--border", metavar="FILL", help=help)


# The encoder options, shared by fix, batch and reskew.
def codec_option(help: str = "h264, hevc, prores or ffv1 (default: as the source)."):
    return typer.Option(None, "--codec", metavar="CODEC", help=help)


def crf_option(help: str = "x264/x265 quality (default 16)."):
    return typer.Option(None, "--crf", metavar="N", parser=whole_number, help=help)


def preset_option():
    return typer.Option(None, "--preset", metavar="NAME", help="x264/x265 speed preset (default medium).")


# The motion model and lens options, shared by fix, measure, preview and batch.
MODEL_HELP = ("Motion model: auto (default: the similarity unless a wide lens turning is seen), "
              "similarity (pan, tilt, roll, zoom of the picture) or rotation (a camera turning "
              "about its centre, through a lens).")
HFOV_HELP = "Horizontal field of view of the stored frame, degrees (the lens for the rotation model)."
FOCAL_HELP = ("Focal length of the lens: 26mm or 1450px; mm is the 35 mm-equivalent figure phone "
              "makers quote, px is in pixels of the stored frame.")
DISTORTION_HELP = "Radial lens distortion K1 or K1,K2 (Brown–Conrady, OpenCV's convention)."


def model_option(default: Optional[str] = "auto"):
    return typer.Option(default, "--model", metavar="MODEL", help=MODEL_HELP)


def hfov_option():
    return typer.Option(None, "--hfov", metavar="DEG", help=HFOV_HELP)


def focal_option():
    return typer.Option(None, "--focal-length", metavar="26mm|1450px", help=FOCAL_HELP)


def distortion_option():
    return typer.Option(None, "--lens-distortion", metavar="K1[,K2]", help=DISTORTION_HELP)


def model_and_lens(model: str, hfov: Optional[str], focal_length: Optional[str],
                   distortion: Optional[str]):
    """``--model`` checked against the known models, and the lens options as a `LensSpec`
    (None when no lens option was given); `UsageProblem` naming the option otherwise."""
    from skewfix.models.choice import MODELS, parse_lens

    choice(model, MODELS, "--model")
    if hfov is None and focal_length is None and distortion is None:
        return model, None
    return model, parse_lens(hfov, focal_length, distortion)


FRAMES_HELP = ("Use only these frames, both included: FIRST-LAST as frame numbers (a video's first "
               "frame is 1, a sequence's frames are its file numbers) or as timecodes at the clip's "
               "rate (00:00:04:00-00:00:16:00); 120- runs to the end.")


def frames_option():
    return typer.Option(None, "--frames", metavar="FIRST-LAST", help=FRAMES_HELP)
