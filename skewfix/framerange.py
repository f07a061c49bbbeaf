"""Part of a clip: ``--frames FIRST-LAST`` as frame numbers or as timecodes.

Frame numbers (the README's convention): the frames of a video are counted
from 1 in presentation order (the first frame, at timecode 00:00:00:00, is
frame 1); the frames of an image sequence carry their file numbers
(``plate.1001.tif`` is frame 1001). Both ends are included: ``120-480`` is
361 frames. An end may be left open: ``120-`` runs to the last frame,
``-480`` starts at the first.

Timecodes ``HH:MM:SS:FF`` count frames at the clip's nominal rate (the
frame rate rounded to a whole number: 30 for 30000/1001), from 00:00:00:00
at the clip's first frame, or from the clip's own start timecode when it
carries one (a ``timecode`` tag, as cameras and editing systems write it).
A ``;`` or ``.`` before the frames marks drop-frame timecode for
30000/1001 and 60000/1001 clips: frame numbers 0 and 1 (0 to 3 at 60000/1001)
are skipped at the start of every minute except each tenth (SMPTE ST 12-1).

`FrameRange.resolve` turns the text into the 0-based positions, in the clip,
of the first and last frame to use, given the clip's `VideoInfo`; the
decoders (`skewfix.decode`, `skewfix.sequence`) then deliver only those
frames, numbered from 0, with times and timestamps counted from the first.
"""

from __future__ import annotations

import re
from dataclasses import dataclass
from fractions import Fraction

from skewfix.errors import InputError, UsageProblem

OPTION = "--frames"
_NUMBER = re.compile(r"^\d+$")
_TIMECODE = re.compile(r"^(\d{1,2}):(\d{2}):(\d{2})([:;.])(\d{2,3})$")


#: frames of a video (not a sequence) are numbered from 1, in every option and output
VIDEO_FIRST_NUMBER = 1


def first_frame_number(info) -> int:
    """The number of the first frame a source delivers: a sequence's first file number (of the
    files read), else 1 for a video, or the number of the first frame ``--frames`` kept."""
    if info.is_sequence and info.first_number is not None:
        return int(info.first_number)
    return VIDEO_FIRST_NUMBER + int(getattr(info, "first_index", 0) or 0)




def _clip_first_number(info) -> int:
    """The number of the whole clip's first frame (whatever part ``--frames`` keeps)."""
    return int(info.first_number) if info.is_sequence and info.first_number is not None else VIDEO_FIRST_NUMBER


def nominal_rate(rate: Fraction) -> int:
    """The whole frames per second a timecode counts at (30 for 30000/1001; SMPTE ST 12-1)."""
    return max(1, round(float(rate)))


def timecode_to_frames(text: str, rate: Fraction | None, what: str = OPTION) -> int:
    """Frames from 00:00:00:00 to timecode ``text`` at ``rate`` (non-drop, or drop-frame after ``;``)."""
    match = _TIMECODE.match(text.strip())
    if not match:
        raise UsageProblem(f"{what}: {text!r} is not a timecode HH:MM:SS:FF")
    if not rate:
        raise UsageProblem(f"{what}: timecode {text!r} needs the clip's frame rate, which it does not state")
    hours, minutes, seconds, mark, frames = match.groups()
    h, m, s, f = int(hours), int(minutes), int(seconds), int(frames)
    base = nominal_rate(rate)
    if m > 59 or s > 59 or f >= base:
        raise UsageProblem(f"{what}: {text!r} is not a timecode at {base} frames a second "
                           f"(minutes and seconds 0-59, frames 0-{base - 1})")
    count = ((h * 60 + m) * 60 + s) * base + f
    if mark in ";.":
        if Fraction(rate) * 1001 not in (Fraction(30000), Fraction(60000)):
            raise UsageProblem(f"{what}: {text!r} is drop-frame timecode, which only 30000/1001 and "
                               f"60000/1001 clips use (this clip runs at {rate})")
        dropped = 2 * base // 30  # frame numbers skipped per minute
        if s == 0 and f < dropped and m % 10 != 0:
            raise UsageProblem(f"{what}: {text!r} does not exist in drop-frame timecode "
                               f"(frames 0-{dropped - 1} of minute {m} are skipped)")
        minutes_total = h * 60 + m
        count -= dropped * (minutes_total - minutes_total // 10)
    return count


def frames_to_timecode(count: int, rate: Fraction, drop_frame: bool = False) -> str:
    """The timecode of the frame ``count`` frames after 00:00:00:00 (inverse of `timecode_to_frames`)."""
    base = nominal_rate(rate)
    mark = ":"
    if drop_frame:
        mark = ";"
        dropped = 2 * base // 30
        per_ten = base * 600 - 9 * dropped  # frames in ten minutes
        per_minute = base * 60 - dropped  # frames in a minute that drops numbers
        tens, rest = divmod(count, per_ten)
        count += 9 * dropped * tens + (dropped * ((rest - dropped) // per_minute) if rest >= dropped else 0)
    frames = count % base
    seconds = count // base
    return f"{seconds // 3600 % 24:02d}:{seconds // 60 % 60:02d}:{seconds % 60:02d}{mark}{frames:02d}"


def part_start_timecode(info) -> str | None:
    """The timecode of the first frame delivered (a clip's own start timecode moved on by
    ``--frames``), for the output to carry; None when the clip has none (or an unreadable one)."""
    if not info.start_timecode or not info.rate:
        return None
    try:
        start = timecode_to_frames(info.start_timecode, info.rate, "the clip's start timecode")
    except UsageProblem:
        return None
    drop = info.start_timecode.strip()[-3] in ";."
    return frames_to_timecode(start + info.first_index, info.rate, drop)


def _check_end(text: str) -> str:
    text = text.strip()
    if text and not (_NUMBER.match(text) or _TIMECODE.match(text)):
        raise UsageProblem(f"{OPTION}: {text!r} is neither a frame number nor a timecode HH:MM:SS:FF "
                           "(e.g. --frames 120-480 or --frames 00:00:04:00-00:00:16:00)")
    return text


@dataclass(frozen=True)
class FrameRange:
    """The frames asked for, as given; `resolve` says where they are in a clip."""

    first: str  # a frame number, a timecode, or "" for the clip's first frame
    last: str  # likewise, "" for the clip's last frame

    @property
    def text(self) -> str:
        return f"{self.first}-{self.last}"

    def _position(self, end: str, info, start_frames: int) -> int:
        """0-based position in the clip of the frame ``end`` names."""
        if _NUMBER.match(end):
            base = _clip_first_number(info)
            number = int(end)
            if number < base:
                raise InputError(f"{info.path}: {OPTION} {self.text}: frame {number} comes before the "
                                 f"first frame, {base}")
            return number - base
        position = timecode_to_frames(end, info.rate) - start_frames
        if position < 0:
            raise InputError(f"{info.path}: {OPTION} {self.text}: {end} comes before the clip's start "
                             f"timecode {info.start_timecode}")
        return position

    def resolve(self, info, frame_count: int | None) -> tuple[int, int | None]:
        """(first, last) 0-based positions in the clip, both included; ``last`` is None for an
        open end on a clip whose length is not known yet. ``frame_count``: the clip's frames,
        if known, to refuse a range that runs past its end before any work is done."""
        start = timecode_to_frames(info.start_timecode, info.rate, "the clip's start timecode") \
            if info.start_timecode and (":" in self.first + self.last) else 0
        first = self._position(self.first, info, start) if self.first else 0
        last = self._position(self.last, info, start) if self.last else None
        if last is None and frame_count:
            last = frame_count - 1
        if last is not None and last < first:
            raise UsageProblem(f"{OPTION} {self.text}: the last frame comes before the first")
        if frame_count and last is not None and last >= frame_count:
            raise InputError(past_the_end(info, frame_count, self, last))
        return first, last


def past_the_end(info, frame_count: int, asked: FrameRange, last: int) -> str:
    """The message for a range that asks for frames the clip does not have."""
    base = _clip_first_number(info)
    return (f"{info.path}: has {frame_count} frames ({base} to {base + frame_count - 1}); "
            f"{OPTION} {asked.text} asks for frames up to {base + last}")


def delivered_position(text: str, info, option: str = "--frame") -> int:
    """Where, among the frames a source delivers (0 = the first), the frame ``text`` names
    (a frame number in the README's numbering, or a timecode)."""
    if _NUMBER.match(text):
        return int(text) - first_frame_number(info)
    start = timecode_to_frames(info.start_timecode, info.rate, "the clip's start timecode") \
        if info.start_timecode else 0
    return timecode_to_frames(text, info.rate, option) - start - info.first_index


def parse_frame_range(text: str | None) -> FrameRange | None:
    """``--frames`` as given on the command line (None when not given); the syntax is checked
    here, the numbers against the clip when it is opened."""
    if text is None:
        return None
    value = text.strip()
    if value.count("-") != 1:
        raise UsageProblem(f"{OPTION}: give FIRST-LAST, e.g. 120-480 or 00:00:04:00-00:00:16:00, not {text!r}")
    first, last = (_check_end(part) for part in value.split("-"))
    if not first and not last:
        raise UsageProblem(f"{OPTION}: give at least the first or the last frame, e.g. 120-480")
    return FrameRange(first, last)


def parse_frame(text: str | None, option: str = "--frame") -> str | None:
    """One frame (``--frame``): a frame number or a timecode, checked like an end of ``--frames``."""
    if text is None:
        return None
    value = text.strip()
    if not value:
        raise UsageProblem(f"{option}: give a frame number or a timecode")
    try:
        return _check_end(value)
    except UsageProblem:
        raise UsageProblem(f"{option}: {text!r} is neither a frame number nor a timecode HH:MM:SS:FF") from None
