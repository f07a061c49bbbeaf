"""The extra outputs of `fix`, and helpers the plate commands share.

`FixDeliverables` writes what ``fix --save-motion/--save-motion-csv/
  --save-maps/--save-matte/--report`` ask for, each whole or not at all.

Warp maps (``--save-maps DIR``) are one pair per frame: ``correct_map.NNNN``
(samples the input to give the corrected frame) and ``reskew_map.NNNN``
(samples a clean frame to give the rolling-shutter one), as 32-bit float TIFF
(``--map-format tiff``, the default) or 2-channel float OpenEXR (``exr``), in
absolute pixels (``--map-units pixels``, the default) or normalized 0..1; see
`skewfix.mapfiles` for the layouts and conventions. With pixel maps read by
OpenCV, ``cv2.remap(frame, x, y, cv2.INTER_CUBIC,
borderMode=cv2.BORDER_REPLICATE)`` reproduces the correction. Maps and
mattes are numbered like the output (`skewfix.sequence.first_frame_number`).
"""

from __future__ import annotations

import os
from dataclasses import replace
from pathlib import Path

import numpy as np

from skewfix.errors import InputError, UsageProblem
from skewfix.mapfiles import MAP_FORMATS, MAP_UNITS, write_map
from skewfix.sequence import (DEPTHS, FramePattern, StagedSequence, check_float_output, check_sequence_output,
                              first_frame_number, is_float_sequence, is_pattern, open_sink, parse_pattern,
                              planes_to_rgb)

MAP_NAMES = ("correct_map", "reskew_map")


# --------------------------------------------------------------------------
# Helpers shared by the commands
# --------------------------------------------------------------------------

def decoded_frame_at(path: str, fps, index: int, frames=None):
    """Decode frames of ``path`` (of its ``frames`` range, if given) up to ``index`` and return
    that `DecodedFrame`."""
    from skewfix.decode import open_source

    with open_source(path, fps, frames) as source:
        for frame in source.frames():
            if frame.index == index:
                return frame
    raise InputError(f"{path}: has no frame {index}")


def still_png(before_rgb: np.ndarray, after_rgb: np.ndarray, labels=("as shot", "corrected")) -> bytes:
    """The before/after panel (`skewfix.preview.side_by_side`) as PNG bytes."""
    from skewfix.preview import png_bytes, side_by_side

    return png_bytes(side_by_side([before_rgb, after_rgb], labels))


def check_distinct_outputs(input_path: str, paths: dict[str, str | None]) -> None:
    """Refuse two outputs with the same name, or an output that is the input."""
    seen = {os.path.realpath(input_path): "INPUT"}
    for option, path in paths.items():
        if path is None:
            continue
        real = os.path.realpath(path)
        if real in seen:
            raise UsageProblem(f"{option} {path}: is the same file as {seen[real]}")
        seen[real] = option


def check_output_options(output: str, sink_options: dict) -> None:
    """Refuse output options that are malformed or do not apply to OUTPUT's kind (video or sequence).

    ``sink_options``: ``codec``, ``crf``, ``preset`` and ``depth`` as given (None when not).
    """
    from skewfix.cli.options import choice
    from skewfix.encode import CODECS

    codec, crf, depth = (sink_options.get(key) for key in ("codec", "crf", "depth"))
    if codec is not None:
        choice(codec.lower(), tuple(CODECS), "--codec")
    if crf is not None and not 0 <= crf <= 51:
        raise UsageProblem(f"--crf must be between 0 and 51, not {crf}")
    if is_pattern(output):
        video_only = [f"--{key}" for key in ("codec", "crf", "preset") if sink_options.get(key) is not None]
        if video_only:
            verb = "applies" if len(video_only) == 1 else "apply"
            raise UsageProblem(f"{'/'.join(video_only)} {verb} to video output; an image sequence takes its "
                               "type from the file extension (.png, .tif, .exr)")
        if is_float_sequence(output):
            from skewfix.exr import FLOAT_DEPTHS

            if depth is not None and depth not in FLOAT_DEPTHS:
                raise UsageProblem(f"--depth for OpenEXR output must be 16 (half) or 32 (float), not {depth}")
        elif depth is not None and depth not in DEPTHS:
            raise UsageProblem(f"--depth must be 8 or 16, not {depth}")
    elif depth is not None:
        raise UsageProblem("--depth applies to image-sequence output (e.g. plate.%04d.tif)")


def solve_with_model(analysis, plan, request: str):
    """The clip's motion for a `skewfix.cameras.ReadoutPlan` and a ``--model`` request, as
    `skewfix.pipeline.fix_clip` solves it: with a readout to measure (or a saved camera's
    to check), the model is chosen at no readout first, and a focal length estimated from
    the footage is measured again at the readout found. Returns (clock, motion model)."""
    from skewfix.pipeline import choose_with_readout, solve

    seconds, order, _origin, chosen = choose_with_readout(analysis, request, plan.lens, plan.seconds,
                                                          plan.line_order, plan.resolver)
    return solve(analysis, seconds, order, choice=chosen)


def count_frames(path: str, info) -> int:
    """Frames in a clip or sequence: the stream's own count, else its video packets."""
    if info.frame_count:
        return int(info.frame_count)
    import av

    with av.open(path) as container:
        stream = container.streams.video[0]
        return sum(1 for packet in container.demux(stream) if packet.size)


# --------------------------------------------------------------------------
# fix: the extra deliverables
# --------------------------------------------------------------------------

class FixDeliverables:
    """Motion file, CSV, warp maps, matte and report for one `fix` run.

    ``check()`` refuses bad paths before any work; ``sink_factory`` opens the
    output (image sequence or clip) and the staged map/matte sequences once the
    clip is known; ``on_frame`` is the pipeline's per-frame callback;
    ``finish(result)`` writes the rest; ``discard()`` removes everything staged.
    """

    def __init__(self, input_path: str, output: str, *, motion=None, motion_csv=None, maps_dir=None,
                 matte=None, report=None, reference_line="middle", border="edge", force=False, fps=None,
                 sink_options: dict | None = None, map_format: str = "tiff", map_units: str = "pixels"):
        self.input, self.output = input_path, output
        self.motion, self.motion_csv, self.maps_dir, self.matte, self.report = motion, motion_csv, maps_dir, matte, report
        self.reference_line, self.border, self.force, self.fps = reference_line, border, force, fps
        self.sink_options = sink_options or {}
        self.map_format, self.map_units = map_format, map_units
        self.info = None
        self._maps: dict[str, StagedSequence] = {}
        self._matte: StagedSequence | None = None
        self._matte_pattern: FramePattern | None = None
        self._still = (-1.0, None, None, None)  # (skew size, frame index, decoded frame, planes after)
        self._skew: dict[int, tuple[float, float]] = {}  # per frame, for the report

    @property
    def wants_frames(self) -> bool:
        return bool(self.maps_dir or self.matte or self.report)

    def check(self) -> None:
        from skewfix.cli.options import choice
        from skewfix.motionfile import check_new_file

        check_output_options(self.output, self.sink_options)
        choice(self.map_format, tuple(MAP_FORMATS), "--map-format")
        choice(self.map_units, MAP_UNITS, "--map-units")
        if self.maps_dir is None and (self.map_format, self.map_units) != ("tiff", "pixels"):
            raise UsageProblem("--map-format and --map-units apply to the maps of --save-maps DIR")
        if self.map_format == "exr" or is_float_sequence(self.output):
            from skewfix.exr import openexr

            openexr()
        check_float_output(self.input, self.output)
        if is_pattern(self.output):
            check_sequence_output(self.input, self.output, self.force)
        check_distinct_outputs(self.input, {"OUTPUT": self.output, "--save-motion": self.motion,
                                            "--save-motion-csv": self.motion_csv, "--report": self.report})
        for option, path in (("--save-motion", self.motion), ("--save-motion-csv", self.motion_csv),
                             ("--report", self.report)):
            if path is not None:
                check_new_file(path, self.force, option)
        if self.matte is not None:
            if not is_pattern(self.matte):
                raise UsageProblem(f"--save-matte {self.matte}: give a numbered pattern like matte.%04d.png")
            self._matte_pattern = check_sequence_output(self.input, self.matte, self.force)
            if is_pattern(self.output) and parse_pattern(self.output).same_sequence(self._matte_pattern):
                raise UsageProblem(f"--save-matte {self.matte}: is the same sequence as OUTPUT")
        if self.maps_dir is not None:
            folder = Path(self.maps_dir)
            if folder.exists() and not folder.is_dir():
                raise UsageProblem(f"--save-maps {self.maps_dir}: is a file; give a folder")
            if not (folder.parent if str(folder.parent) else Path(".")).is_dir():
                raise UsageProblem(f"--save-maps {self.maps_dir}: folder {folder.parent} does not exist")
            for name in MAP_NAMES:
                found = self._map_pattern(name).numbers_present()
                if found and not self.force:
                    raise UsageProblem(f"--save-maps {self.maps_dir}: already holds {name} files "
                                       "(add --force to replace them)")

    def _map_pattern(self, name: str) -> FramePattern:
        return parse_pattern(str(Path(self.maps_dir) / f"{name}.%04d{MAP_FORMATS[self.map_format]}"))

    def sink_factory(self, info, template=None):
        self.info = info
        first = first_frame_number(info)
        try:
            if self.maps_dir is not None:
                for name in MAP_NAMES:
                    self._maps[name] = StagedSequence(self._map_pattern(name), first, self.force)
            if self._matte_pattern is not None:
                self._matte = StagedSequence(self._matte_pattern, first, self.force)
            return open_sink(self.input, self.output, info, force=self.force, template=template,
                             **self.sink_options)
        except BaseException:
            self.discard()
            raise

    def on_frame(self, frame, wm, planes) -> None:
        from skewfix.motionfile import map_skew
        from skewfix.warp import outside_matte

        k = frame.index
        if self.maps_dir is not None or self._matte is not None:
            map_x, map_y = wm.full(self.info.width, self.info.height)
            if self.maps_dir is not None:
                write_map(self._maps["correct_map"], k, map_x, map_y, self.map_units)
            if self._matte is not None:
                matte = outside_matte(map_x, map_y).astype(np.uint8) * 255
                self._matte.write(k, matte)
        if self.report is not None:
            # the render's map includes a crop's enlargement, which is no skew: with
            # --border crop the report reads the skew from the motion instead (finish)
            skew = map_skew(wm)
            if self.border != "crop":
                self._skew[k] = skew
            size = float(np.sum(np.abs(skew)))  # picks the still (a crop's part is the same every frame)
            if size > self._still[0]:  # keep copies: the render reuses its buffers
                before = replace(frame, planes=[np.array(p) for p in frame.planes])
                self._still = (size, k, before, [np.array(p) for p in planes])

    def finish(self, result) -> list[str]:
        """Write the motion, CSV, maps, matte and report; returns lines saying what was written."""
        from skewfix.motionfile import save_motion, save_motion_csv, skew_per_frame
        from skewfix.warp import reskew_map

        said = []
        if self.border == "crop" and (self.motion or self.maps_dir):
            result.notes.append("the motion file and reskew maps describe the correction without the crop "
                                "enlargement; reskew plates corrected with --border edge or black")
        try:
            if self.motion is not None:
                save_motion(self.motion, result.model, result.clock, self.reference_line, result.info)
                said.append(f"motion: {self.motion}")
            if self.motion_csv is not None:
                save_motion_csv(self.motion_csv, result.model, result.clock, self.reference_line,
                                first_number=first_frame_number(result.info))
                said.append(f"motion table: {self.motion_csv}")
            if self._maps:
                w, h = result.info.width, result.info.height
                for k in range(len(result.clock.frame_times)):
                    wm = reskew_map(result.model, result.clock, k, self.reference_line)
                    write_map(self._maps["reskew_map"], k, *wm.full(w, h), self.map_units)
                for staged in self._maps.values():
                    staged.commit()
                said.append(f"warp maps: {self.maps_dir} ({len(result.clock.frame_times)} pairs)")
            if self._matte is not None:
                self._matte.commit()
                said.append(f"matte: {self.matte}")
            if self.report is not None:
                # the skew seen while rendering; frames the render did not map are recomputed
                n = len(result.clock.frame_times)
                skew = (np.array([self._skew[k] for k in range(n)]) if len(self._skew) == n
                        else skew_per_frame(result.model, result.clock, self.reference_line))
                self._write_report(result, skew)
                said.append(f"report: {self.report}")
        except BaseException:
            self.discard()
            raise
        return said

    def _write_report(self, result, skew) -> None:
        from skewfix.report import ReportContent, write_report

        content = ReportContent(self.reference_line, self.border, skew, first_number=first_frame_number(result.info),
                                outputs=[(opt, p) for opt, p in (("motion file", self.motion),
                                                                 ("motion table", self.motion_csv),
                                                                 ("warp maps", self.maps_dir),
                                                                 ("matte", self.matte)) if p])
        _, k, before, after = self._still
        if k is not None:
            content.still_png = still_png(planes_to_rgb(before.planes, before.pix_fmt, result.info, 8),
                                          planes_to_rgb(after, before.pix_fmt, result.info, 8))
            content.still_frame = content.first_number + k
        write_report(self.report, result, content)

    def discard(self) -> None:
        for staged in list(self._maps.values()) + ([self._matte] if self._matte else []):
            staged.discard()
