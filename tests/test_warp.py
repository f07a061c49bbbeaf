"""The remapper against SciPy's reference resampler, and the maps' physics."""

from fractions import Fraction

import numpy as np
from scipy import ndimage
from skimage import data

from skewfix.motion import MotionModel, MotionSegment
from skewfix.rowclock import RowClock, frame_times_from_rate
from skewfix.warp import WarpMap, correction_map, remap_plane, reskew_map


def constant_pan_model(w, h, vx, duration=1.0, n=60):
    """A model whose pan_x grows linearly: knots on a line give an exact line."""
    spacing = duration / n
    coef = np.zeros((4, n + 3))
    knot_times = 0.0 + (np.arange(n + 3) - 1) * spacing  # cubic B-spline reproduces linear functions
    coef[0] = vx * knot_times
    return MotionModel(w, h, [MotionSegment(0, 9, 0.0, spacing, coef)])


def test_remap_matches_scipy_map_coordinates():
    # Reference: scipy.ndimage.map_coordinates (order=1 is bilinear interpolation).
    img = data.camera().astype(np.float32)
    h, w = img.shape
    rng = np.random.default_rng(0)
    yy, xx = np.mgrid[0:h, 0:w].astype(np.float32)
    mx = xx + 3.3 + 2 * np.sin(yy / 40).astype(np.float32)
    my = yy - 1.7 + rng.uniform(-0.5, 0.5, size=(1, w)).astype(np.float32)
    ours = remap_plane(img, mx, my, "edge", 0, interpolation="linear")
    ref = ndimage.map_coordinates(img, [my, mx], order=1, mode="nearest")
    inner = (slice(10, h - 10), slice(10, w - 10))
    assert np.max(np.abs(ours[inner] - ref[inner])) < 0.5  # cv2 uses 5-bit fixed-point weights


def test_cubic_remap_close_to_scipy_spline_on_16_bit():
    # 16-bit planes are resampled at their own depth; compare with a cubic spline (order=3).
    img = (data.camera().astype(np.float64) * 257).astype(np.uint16)
    h, w = img.shape
    yy, xx = np.mgrid[0:h, 0:w].astype(np.float32)
    mx, my = xx + 0.37, yy + 0.61
    ours = remap_plane(img, mx, my, "edge", 0, interpolation="cubic")
    assert ours.dtype == np.uint16
    ref = ndimage.map_coordinates(img.astype(np.float64), [my, mx], order=3, mode="nearest")
    inner = (slice(10, h - 10), slice(10, w - 10))
    rel = np.median(np.abs(ours[inner].astype(np.float64) - ref[inner])) / 65535
    assert rel < 2e-3


def test_global_shutter_map_is_identity():
    # A global-shutter sensor reads all rows at once: nothing to correct (fact of the trade).
    model = constant_pan_model(320, 180, vx=2000.0)
    clock = RowClock(frame_times_from_rate(10, Fraction(25)), 180, 0.0)
    assert correction_map(model, clock, 4).is_identity()
    assert reskew_map(model, clock, 4).is_identity()


def test_skew_grows_linearly_with_readout():
    # For a steady pan the lean is v * readout over the frame height (common practice).
    w, h, vx = 320, 180, 1500.0
    model = constant_pan_model(w, h, vx)
    slants = []
    for readout in (0.005, 0.010, 0.020, 0.030):
        clock = RowClock(frame_times_from_rate(10, Fraction(25)), h, readout)
        mx, _ = correction_map(model, clock, 4).full()
        slants.append(float(np.median(mx[-1] - mx[0])))
    slants = np.array(slants)
    # pan_x grows, so the picture content moves left: later (lower) rows read further left
    expected = -vx * np.array([0.005, 0.010, 0.020, 0.030]) * (h - 1) / h
    assert np.allclose(slants, expected, rtol=0.01)


def test_reskew_inverts_correction():
    w, h = 320, 180
    model = constant_pan_model(w, h, vx=1800.0)
    clock = RowClock(frame_times_from_rate(10, Fraction(25)), h, 0.02)
    cx, cy = correction_map(model, clock, 3).full()
    rx, ry = reskew_map(model, clock, 3).full()
    # applying reskew then correction returns every inner pixel to where it was
    yy, xx = np.mgrid[0:h, 0:w].astype(np.float32)
    back_x = ndimage.map_coordinates(rx, [cy, cx], order=1)
    back_y = ndimage.map_coordinates(ry, [cy, cx], order=1)
    inner = (slice(5, h - 5), slice(60, w - 60))
    assert np.max(np.abs(back_x - xx)[inner]) < 0.05
    assert np.max(np.abs(back_y - yy)[inner]) < 0.05


def test_chroma_map_is_scaled():
    wm = WarpMap(np.full((4, 4), 6.0, np.float32), np.full((4, 4), -2.0, np.float32), 64, 64)
    mx, my = wm.full(32, 32, (2, 2))
    assert mx.shape == (32, 32)
    assert np.allclose(mx - np.arange(32)[None, :], 3.0)
    assert np.allclose(my - np.arange(32)[:, None], -1.0)


def _coarse_map(w, h, fn):
    from skewfix.warp import coarse_grid

    gx, gy = coarse_grid(w, h)
    dx, dy = fn(gx, gy)
    return WarpMap(np.asarray(dx, np.float32), np.asarray(dy, np.float32), w, h)


def test_cubic_through_float_equals_opencvs_own_integer_cubic():
    """Cubic is worked in float32 and rounded back (faster); the result must equal OpenCV's own
    cubic at the plane's depth (cv2.remap, reference) to the code value: scikit-image's camera
    photograph at 8 and 16 bit, RGB, and a 0/full-scale checkerboard whose overshoot saturates."""
    import cv2

    from skewfix.buffers import PlanePool
    from skewfix.warp import warp_plane

    checker = (np.indices((256, 320)).sum(0) // 8 % 2).astype(np.uint8) * 255
    camera = data.camera()
    planes = [camera, camera.astype(np.uint16) * 257, (checker.astype(np.uint16) * 257),
              checker, np.dstack([camera, camera[::-1], camera[:, ::-1]])]
    pool = PlanePool()
    for plane in planes:
        h, w = plane.shape[:2]
        wm = _coarse_map(w, h, lambda gx, gy: (3.37 + 0.01 * gy + 0 * gx, -1.61 + 0.003 * gx + 0 * gy))
        mx, my = wm.full(w, h)
        for border, mode in (("edge", cv2.BORDER_REPLICATE), ("black", cv2.BORDER_CONSTANT)):
            fill = 16 if plane.ndim == 2 else (16, 128, 128)
            ref = cv2.remap(plane, mx, my, cv2.INTER_CUBIC, borderMode=mode, borderValue=fill)
            ours = remap_plane(plane, mx, my, border, fill, interpolation="cubic")
            assert ours.dtype == plane.dtype
            assert np.array_equal(ours, ref), (plane.dtype, plane.shape, border)
            strip = warp_plane(plane, wm, (1, 1), border, fill, "cubic", pool=pool)
            inner = (slice(4, h - 4), slice(4, w - 4))  # the strips sample at 1/32 px as cv2.remap does
            assert np.abs(strip[inner].astype(np.int64) - ref[inner]).max() <= (257 if plane.dtype == np.uint16
                                                                                 else 1)
    # the checkerboard does overshoot both ends in float, so the saturation above was exercised
    h, w = checker.shape
    mx, my = _coarse_map(w, h, lambda gx, gy: (3.37 + 0 * gx, -1.61 + 0 * gy)).full(w, h)
    wide = cv2.remap(checker.astype(np.float32), mx, my, cv2.INTER_CUBIC, borderMode=cv2.BORDER_REPLICATE)
    assert wide.max() > 255.5 and wide.min() < -0.5


def test_strip_warp_agrees_with_scipy_on_every_kind_of_map():
    """The strip-wise warp (affine strips, tiles, or remap where neither fits) against
    scipy.ndimage.map_coordinates (order=1, bilinear) on the full map, on scikit-image's
    camera photograph: a pan with shear, a pan with roll, and a perspective (quadratic) map
    that no affine strip fits. 8-bit and 16-bit, 4:2:0 chroma size included."""
    from skewfix.warp import StripAffines, warp_plane

    maps = {
        "shear": lambda gx, gy: (12 * (gy + 0.5) / 512 + 0 * gx, 3 * (gy + 0.5) / 512 + 0 * gx),
        "roll": lambda gx, gy: (5 + 0.004 * (gy - 256), -2 - 0.004 * (gx - 256)),
        "perspective": lambda gx, gy: (4e-4 * (gx - 256) ** 2, 2e-4 * (gx - 256) * (gy - 256)),
    }
    seen_paths = set()
    for name, fn in maps.items():
        for dtype, sub in ((np.uint8, (1, 1)), (np.uint16, (1, 1)), (np.uint8, (2, 2))):
            img = data.camera()
            if sub != (1, 1):
                img = img[::2, ::2]
            img = img.astype(dtype) * (257 if dtype == np.uint16 else 1)
            h, w = img.shape
            wm = _coarse_map(512, 512, fn)
            strips = StripAffines.of(wm, w, h, sub)
            seen_paths |= {"affine" if t[4] is not None else "remap" for t in strips.tiles}
            ours = warp_plane(img, wm, sub, "edge", 0, "linear")
            mx, my = wm.full(w, h, sub)
            ref = ndimage.map_coordinates(img.astype(np.float64), [my, mx], order=1, mode="nearest")
            inner = (slice(12, h - 12), slice(12, w - 12))
            level = 257 if dtype == np.uint16 else 1
            # cv2 samples at 1/32 px with fixed-point weights: within a code level or so
            assert np.max(np.abs(ours[inner] - ref[inner])) <= 1.5 * level, (name, dtype, sub)
    assert seen_paths == {"affine", "remap"}  # both paths were exercised
