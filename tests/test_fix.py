"""End-to-end correction on short synthetic clips with exact truth."""

from fractions import Fraction

import av
import numpy as np
import pytest

from conftest import decode_rgb
from skewfix.pipeline import FixOptions, fix_clip
from skewfix.synth.residual import clip_residual
from skewfix.synth.shutter import to_uint8


def streams(path):
    with av.open(str(path)) as c:
        v = c.streams.video[0]
        return {
            "types": sorted(s.type for s in c.streams),
            "rate": v.average_rate,
            "pix_fmt": v.codec_context.pix_fmt,
            "codec": v.codec_context.name,
            "pts": [f.pts for f in c.decode(video=0)],
        }


def audio_packets(path):
    with av.open(str(path)) as c:
        if not c.streams.audio:
            return []
        return [bytes(p) for p in c.demux(c.streams.audio[0]) if p.size]


@pytest.mark.parametrize("kind,readout", [("whip", 0.024), ("handheld", 0.024)])
def test_correction_removes_skew(clip_factory, tmp_path, kind, readout):
    src, renderer, clock = clip_factory(kind, readout, n_frames=16)
    out = tmp_path / "fixed.mp4"
    fix_clip(str(src), str(out), FixOptions(readout=readout))
    fixed, orig = decode_rgb(out), decode_rgb(src)
    assert len(fixed) == len(orig) == 16
    inner = range(3, 13)
    truths = {k: to_uint8(renderer.global_view(float(clock.reference_time(k)))) for k in inner}
    before, after = clip_residual(orig, truths, inner), clip_residual(fixed, truths, inner)
    assert after < 0.35 and after < 0.5 * before, (before, after)


def test_readout_zero_is_identity_geometry(clip_factory, tmp_path):
    # A global shutter has nothing to correct (fact of the trade); through the
    # FFV1 codec (IETF RFC 9043: "a lossless, intra-frame video encoding format")
    # the pixels come back unchanged.
    src, _, _ = clip_factory("whip", 0.0, n_frames=10, codec="ffv1", pix_fmt="yuv420p", suffix=".mkv")
    out = tmp_path / "same.mkv"
    fix_clip(str(src), str(out), FixOptions(readout=0.0))
    a, b = decode_rgb(src), decode_rgb(out)
    assert len(a) == len(b) == 10
    assert all(np.array_equal(x, y) for x, y in zip(a, b))


def test_audio_timestamps_and_format_are_kept(clip_factory, tmp_path):
    src, _, _ = clip_factory("handheld", 0.02, n_frames=12, rate=Fraction(30000, 1001), audio=True)
    out = tmp_path / "with_sound.mp4"
    fix_clip(str(src), str(out), FixOptions(readout=0.02))
    a, b = streams(src), streams(out)
    assert b["types"] == a["types"] == ["audio", "video"]
    assert b["rate"] == Fraction(30000, 1001)  # NTSC-family rate kept exactly (SMPTE, from memory)
    assert b["pts"] == a["pts"] and len(b["pts"]) == 12
    assert b["pix_fmt"] == a["pix_fmt"] and b["codec"] == a["codec"] == "h264"
    assert audio_packets(out) == audio_packets(src)  # copied packet for packet


def test_ten_bit_stays_ten_bit(clip_factory, tmp_path):
    src, _, _ = clip_factory("whip", 0.02, n_frames=8, codec="libx265", pix_fmt="yuv420p10le", suffix=".mp4")
    out = tmp_path / "deep.mp4"
    fix_clip(str(src), str(out), FixOptions(readout=0.02))
    info = streams(out)
    assert info["pix_fmt"] == "yuv420p10le" and info["codec"] == "hevc"
    with av.open(str(out)) as c:
        frame = next(c.decode(video=0))
        y = np.frombuffer(frame.planes[0], np.uint16)
    assert y.max() > 255  # real 10-bit samples, not 8-bit values in a 16-bit box


def test_input_is_untouched_and_no_partial_left(clip_factory, tmp_path):
    import hashlib

    src, _, _ = clip_factory("handheld", 0.02, n_frames=8)
    digest = hashlib.sha256(src.read_bytes()).hexdigest()
    out = tmp_path / "o.mp4"
    fix_clip(str(src), str(out), FixOptions(readout=0.02))
    assert hashlib.sha256(src.read_bytes()).hexdigest() == digest
    assert [p.name for p in tmp_path.iterdir()] == ["o.mp4"]
