"""The render loop's plumbing: reused buffers, the deferred output, windows, threads.

These check skewfix's own bookkeeping (common practice for unit tests); the
correction itself is checked against outside references in test_fix.py and
test_warp.py.
"""

import threading

import cv2
import numpy as np
import pytest

from skewfix.buffers import PlanePool
from skewfix.decode import VideoInfo
from skewfix.encode import DeferredSink
from skewfix.motion import MotionSegment
from skewfix.pipeline import RenderSettings, StreamingWarper, opencv_threads


def test_pool_reuses_whole_arrays_but_never_views():
    pool = PlanePool(limit=2)
    a = pool.take((4, 6), np.uint16)
    assert a.shape == (4, 6) and a.dtype == np.uint16
    pool.give(a)
    assert pool.take((4, 6), np.uint16) is a  # the same buffer comes back
    assert pool.take((4, 6), np.uint16) is not a  # and only once
    view = np.zeros((8, 6), np.uint16)[:4]
    pool.give(view)
    assert pool.take((4, 6), np.uint16) is not view
    spares = [np.empty((2, 2), np.uint8) for _ in range(3)]
    pool.give(*spares)
    kept = [pool.take((2, 2), np.uint8) for _ in range(3)]
    assert sum(any(k is s for s in spares) for k in kept) == 2  # at most `limit` spares are kept


class _RecordingSink:
    def __init__(self):
        self.packets, self.frames, self.notes, self.aborted = [], [], ["opened"], False

    def copy_packet(self, packet):
        self.packets.append(packet)

    def write_planes(self, planes, pts, src_fmt):
        self.frames.append(pts)

    def finish(self):
        return "done"

    def abort(self):
        self.aborted = True

    frames_written = property(lambda self: len(self.frames))


def test_deferred_sink_holds_early_packets_and_opens_with_the_first_picture():
    opened = []

    def opener():
        opened.append(_RecordingSink())
        return opened[-1]

    sink = DeferredSink(opener)
    sink.copy_packet("audio 0")
    sink.copy_packet("audio 1")
    assert opened == [] and sink.frames_written == 0
    sink.write_planes([np.zeros((2, 2), np.uint8)], 0, "gray")
    sink.copy_packet("audio 2")
    assert len(opened) == 1
    assert opened[0].packets == ["audio 0", "audio 1", "audio 2"]  # file order kept
    assert sink.notes == ["opened"] and sink.finish() == "done"


def test_deferred_sink_aborted_before_opening_opens_nothing():
    calls = []
    sink = DeferredSink(lambda: calls.append(1))
    sink.copy_packet("audio")
    sink.abort()
    assert calls == []


def test_tabulated_curves_match_the_spline_within_a_thousandth_of_a_pixel():
    # a whip pan's worth of motion: 4000 px/s reached in 0.2 s, with a 12 Hz wobble
    spacing, n = 0.01, 80
    knots = np.arange(n) * spacing
    coef = np.zeros((4, n))
    coef[0] = 4000 * np.clip(knots, 0, 0.2) ** 2 / 0.4 + 3.0 * np.sin(2 * np.pi * 12 * knots)
    coef[1] = 2.0 * np.cos(2 * np.pi * 9 * knots)
    coef[2] = 0.01 * np.sin(2 * np.pi * 7 * knots)
    seg = MotionSegment(0, 10, -0.02, spacing, coef)
    table = seg.tabulated(0.10, 0.16, samples=513)
    t = np.random.default_rng(0).uniform(0.10, 0.16, 5000)
    exact, tabled = np.array(seg.evaluate(t)), np.array(table.evaluate(t))
    assert np.max(np.abs(exact[:2] - tabled[:2])) < 1e-3  # pixels
    assert np.max(np.abs(exact[2] - tabled[2])) * 1100 < 1e-3  # roll, as pixels at the frame's corner
    outside = np.array([0.05, 0.2])  # beyond the table: evaluated exactly
    assert np.allclose(np.array(table.evaluate(outside)), np.array(seg.evaluate(outside)))


def _info(width=64, height=48):
    return VideoInfo("x.mp4", width, height, "yuv420p", 8, "h264", None, None, None, None, None)


def test_windows_start_short_and_double_up_to_the_full_window():
    warper = StreamingWarper(_info(), 0.01, "top-down", RenderSettings(), window=16, margin=4)
    try:
        starts, sizes, a = [], [], 0
        while a < 80:
            starts.append(a)
            sizes.append(warper.window_from(a))
            a += sizes[-1]
        assert sizes[:5] == [8, 8, 16, 16, 16]
        assert warper.lookahead_limit == 16 + 2 * 4 + 1
    finally:
        warper.close()


def test_opencv_thread_count_is_restored():
    before = cv2.getNumThreads()
    with opencv_threads(1):
        assert cv2.getNumThreads() == 1
    assert cv2.getNumThreads() == before


def test_render_reuses_plane_buffers(clip_factory, tmp_path, monkeypatch):
    """Over a 48-frame clip the render allocates far fewer planes than it handles,
    and the output is frame for frame what it was without reuse."""
    import skewfix.pipeline as pipeline
    from conftest import decode_rgb
    from skewfix.pipeline import FixOptions, fix_clip

    src, _renderer, _clock = clip_factory("handheld", readout=0.02, n_frames=48)
    made = []

    class CountingPool(PlanePool):
        def __init__(self, *args, **kwargs):
            super().__init__(*args, **kwargs)
            made.append(self)

    class NoReuse(PlanePool):
        def give(self, *arrays):
            return None

    options = FixOptions(readout=0.02, force=True, codec="ffv1")
    monkeypatch.setattr(pipeline, "PlanePool", CountingPool)
    reused = fix_clip(str(src), str(tmp_path / "reused.mkv"), options)
    monkeypatch.setattr(pipeline, "PlanePool", NoReuse)
    fix_clip(str(src), str(tmp_path / "fresh.mkv"), options)
    handled = reused.frames_written * 3 * 2  # Y, U, V decoded and remapped
    assert made and made[0].allocated < 0.5 * handled  # without reuse it would be all 288
    a, b = decode_rgb(tmp_path / "reused.mkv"), decode_rgb(tmp_path / "fresh.mkv")
    assert len(a) == len(b) == 48
    assert all(np.array_equal(x, y) for x, y in zip(a, b))  # FFV1 is lossless (IETF RFC 9043)


def test_an_output_that_fails_late_leaves_no_thread_and_no_file(clip_factory, tmp_path):
    """The output opens with the first picture, after the threads have started: when it
    cannot be opened the error still comes alone, every thread of ours has ended (one left
    inside OpenCV at exit can abort the interpreter) and nothing is written."""
    from skewfix.errors import UsageProblem
    from skewfix.pipeline import FixOptions, fix_clip

    src, _renderer, _clock = clip_factory("whip", readout=0.02, n_frames=24)
    out_dir = tmp_path / "out"
    out_dir.mkdir()
    with pytest.raises(UsageProblem, match="cannot hold"):
        fix_clip(str(src), str(out_dir / "plate.webm"), FixOptions(readout=0.02, codec="prores"))
    alive = [t.name for t in threading.enumerate() if t.name.startswith("skewfix-") and t.is_alive()]
    assert alive == []
    assert list(out_dir.iterdir()) == []
