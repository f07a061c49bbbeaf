"""Warp maps from the motion model, and remapping of decoded planes.

Written once for every motion model (`skewfix.models`). For an output pixel
``p`` of frame ``k`` (the global-shutter view at the reference instant
``t_ref``) the world point ``q`` seen at ``p`` at ``t_ref`` is found; the
source row ``ys`` that saw it satisfies ``ys = y_image(q, t(k, ys))`` — a
root found by Newton's method to a tolerance — and the source column follows. The
inverse warp (adding a rolling shutter to a clean image) needs no iteration:
row ``y`` of the output is read at ``t(k, y)``.

Maps are computed on a coarse grid as displacements (smooth, small), then
applied to each plane at its own size (chroma with the map scaled) and written
at its own bit depth, so no colour conversion happens: strip by strip with
cv2.warpAffine where the map is affine there, else with cv2.remap from the map
upsampled bilinearly and added to the identity (`warp_plane`).
"""

from __future__ import annotations

from dataclasses import dataclass
from functools import lru_cache

import cv2
import numpy as np

from skewfix.errors import RuntimeProblem
from skewfix.motion import MotionModel
from skewfix.rowclock import RowClock

BORDERS = ("edge", "black", "crop")
GRID_STEP = 32  # px per coarse cell; must be even (chroma uses half)


@dataclass
class WarpMap:
    """A displacement field on a coarse grid for one frame.

    ``dx``/``dy`` hold ``source - target`` at the coarse sample positions
    ``-cell/2 - 0.5 + i * cell`` (both axes). The grid reaches half a cell
    beyond every edge, so a plain bilinear ``cv2.resize`` by the factor
    ``cell`` followed by a crop of ``cell`` pixels reproduces bilinear
    interpolation exactly at every pixel, edges included, with no clamping.
    The same samples serve a 2x-subsampled chroma plane (cell / 2).
    """

    dx: np.ndarray
    dy: np.ndarray
    width: int
    height: int
    cell: int = GRID_STEP

    def is_identity(self, tolerance: float = 1e-6) -> bool:
        """True when no sample moves by more than ``tolerance`` pixels."""
        return float(np.max(np.abs(self.dx))) <= tolerance and float(np.max(np.abs(self.dy))) <= tolerance

    def _absolute_coarse(self, fx: int = 1, fy: int = 1):
        """Coarse absolute source coordinates in a plane subsampled by (fx, fy)."""
        gx, gy = coarse_grid(self.width, self.height, self.cell)
        ax = (gx + self.dx).astype(np.float32)
        ay = (gy + self.dy).astype(np.float32)
        if fx != 1:
            ax = (ax + 0.5) * (1.0 / fx) - 0.5
        if fy != 1:
            ay = (ay + 0.5) * (1.0 / fy) - 0.5
        return ax, ay

    def row(self, y: int):
        """Row ``y`` of ``full()`` (luma size) without upsampling the whole frame."""
        ax, ay = self._absolute_coarse()
        c = self.cell
        s = (y + c + 0.5) / c - 0.5  # position of the row on the coarse grid, as cv2.resize places it
        i = int(np.clip(np.floor(s), 0, ax.shape[0] - 2))
        a = np.float32(s - i)
        out = []
        for coarse in (ax, ay):
            line = (1 - a) * coarse[i] + a * coarse[i + 1]
            wide = cv2.resize(line[None, :], (line.size * c, 1), interpolation=cv2.INTER_LINEAR)
            out.append(wide[0, c:c + self.width])
        return out[0], out[1]

    def full(self, width: int | None = None, height: int | None = None, subsample=(1, 1), pool=None):
        """Absolute source coordinates (map_x, map_y) for a plane of the given size.

        ``subsample`` is the plane's (horizontal, vertical) subsampling factor.
        The coarse *absolute* coordinates are upsampled directly: bilinear
        interpolation reproduces the identity ramp exactly, so no per-pixel
        addition is needed. A chroma plane's coordinates are the luma ones
        mapped through ``u = (x + 0.5) / f - 0.5`` (centre-sited samples).
        With a `skewfix.buffers.PlanePool` the maps are views into its
        buffers; give their ``base`` back when done.
        """
        width = width or self.width
        height = height or self.height
        fx, fy = subsample
        ax, ay = self._absolute_coarse(fx, fy)
        cx, cy = self.cell // fx, self.cell // fy
        gh, gw = ax.shape
        size = (gw * cx, gh * cy)
        maps = []
        for coarse in (ax, ay):
            dst = None if pool is None else pool.take((size[1], size[0]), np.float32)
            wide = cv2.resize(coarse, size, dst=dst, interpolation=cv2.INTER_LINEAR)
            maps.append(wide[cy:cy + height, cx:cx + width])
        return maps[0], maps[1]


@lru_cache(maxsize=32)
def coarse_grid(width: int, height: int, step: int = GRID_STEP):
    """Sample positions of the coarse map: cell centres extended half a cell past each edge.

    Cached and shared: callers must not modify the arrays.
    """
    gw = int(np.ceil(width / step)) + 2
    gh = int(np.ceil(height / step)) + 2
    xs = -step / 2.0 - 0.5 + np.arange(gw) * step
    ys = -step / 2.0 - 0.5 + np.arange(gh) * step
    return np.meshgrid(xs, ys)


def _zoom_about_centre(px, py, width, height, zoom):
    cx, cy = (width - 1) / 2.0, (height - 1) / 2.0
    return cx + (px - cx) / zoom, cy + (py - cy) / zoom


#: a correction map's source rows are solved to this many pixels
ROW_TOLERANCE_PX = 1e-3
MAX_ROW_ITERATIONS = 30


def correction_map(model: MotionModel, clock: RowClock, k: int, reference_line: str = "middle",
                   zoom: float = 1.0, step: int = GRID_STEP, label: int | None = None) -> WarpMap:
    """Map that turns rolling-shutter frame ``k`` into the global-shutter view at its reference row.

    For each output sample the world point seen at ``t_ref`` is found, then the source
    row ``ys`` that saw it, the root of ``g(ys) = y_image(world, t(k, ys)) - ys``, by
    Newton's method to `ROW_TOLERANCE_PX`. ``g`` falls monotonically (a unique source row)
    while the picture moves vertically by less than a frame height per readout; where it
    does not, the frame cannot be corrected and a `RuntimeProblem` says so (``label`` is
    the frame number to name in it).
    """
    w, h = model.width, model.height
    gx, gy = coarse_grid(w, h, step)
    px, py = _zoom_about_centre(gx, gy, w, h, zoom) if zoom != 1.0 else (gx, gy)
    seg = model.segment_for(k)
    t_ref = float(clock.reference_time(k, reference_line))
    world = model.world_from_image(seg, np.float64(t_ref), px, py)  # one instant for the whole frame
    # the source rows lie near the frame: tabulate the curves over its readout and a frame's
    # height either side (rows further out are evaluated exactly)
    t_a, t_b = (float(clock.row_time(k, y)) for y in (-h, 2.0 * h))
    table = seg.tabulated(min(t_a, t_b), max(t_a, t_b), samples=513)
    kind = model.kind
    ys = py.copy()
    xs, y_seen = kind.to_image(table.evaluate(clock.row_time(k, ys)), world)
    for _ in range(MAX_ROW_ITERATIONS):
        g = y_seen - ys
        if clock.readout == 0 or not np.any(np.abs(g) > ROW_TOLERANCE_PX):
            break
        # d y_image / d ys through the row clock, by a one-row difference
        _, y_next = kind.to_image(table.evaluate(clock.row_time(k, ys + 1.0)), world)
        slope = (y_next - y_seen) - 1.0
        if np.any(slope >= -1e-3):
            frame = k if label is None else label
            raise RuntimeProblem(
                f"frame {frame}: the solved motion moves the picture down the frame faster than the rows "
                "are read (more than a frame height per readout), so no source row is unique and the frame "
                "cannot be corrected; check the readout and the line order, or the tracking of a very fast move")
        ys = ys - g / slope
        xs, y_seen = kind.to_image(table.evaluate(clock.row_time(k, ys)), world)
    xs, ys = _finite(xs), _finite(y_seen)
    return WarpMap((xs - gx).astype(np.float32), (ys - gy).astype(np.float32), w, h, step)


def _finite(values: np.ndarray) -> np.ndarray:
    """Samples with no image (a direction behind the camera) are sent far outside the frame."""
    return np.where(np.isfinite(values), values, -1e5)


def reskew_map(model: MotionModel, clock: RowClock, k: int, reference_line: str = "middle",
               step: int = GRID_STEP, overscan: tuple[float, float] = (0.0, 0.0)) -> WarpMap:
    """Map that puts the rolling shutter back: row ``y`` of the output samples the clean
    frame (the view at ``t_ref``) where the world seen by that row at ``t(k, y)`` lay.

    ``overscan`` (mx, my): the clean frame reaches this many pixels beyond the plate on
    each side (CG rendered larger, centred); the map then covers that larger frame, and
    its rows above and below the plate are timed by the row clock carried on past them.
    """
    mx, my = overscan
    w, h = int(round(model.width + 2 * mx)), int(round(model.height + 2 * my))
    gx, gy = coarse_grid(w, h, step)
    px, py = gx - mx, gy - my  # plate coordinates
    seg = model.segment_for(k)
    t_ref = float(clock.reference_time(k, reference_line))
    world = model.world_from_image(seg, clock.row_time(k, py), px, py)
    xs, ys = model.image_from_world(seg, np.full(gx.shape, t_ref), world)
    xs, ys = _finite(xs) + mx, _finite(ys) + my
    return WarpMap((xs - gx).astype(np.float32), (ys - gy).astype(np.float32), w, h, step)


def crop_zoom(maps, width: int, height: int, margin: float = 0.5) -> float:
    """Smallest zoom about the centre that keeps every frame's source inside the frame.

    ``maps`` yields `WarpMap`s computed at zoom 1; the border of the zoomed
    output is checked against the source bounds by bisection.
    """
    zoom_needed = 1.0
    cx, cy = (width - 1) / 2.0, (height - 1) / 2.0
    for wm in maps:
        mx, my = wm.full()
        # how far, as a fraction of the half-size, each pixel's source may reach
        inside = ((mx >= -margin) & (mx <= width - 1 + margin) & (my >= -margin) & (my <= height - 1 + margin))
        if inside.all():
            continue
        # largest centred box (same aspect) whose pixels all map inside
        yy, xx = np.nonzero(~inside)
        r = np.maximum(np.abs(xx - cx) / max(cx, 1), np.abs(yy - cy) / max(cy, 1))
        rmin = float(r.min())
        zoom_needed = max(zoom_needed, 1.0 / max(rmin * 0.995, 1e-3))
    return zoom_needed


INTERPOLATIONS = {"linear": cv2.INTER_LINEAR, "cubic": cv2.INTER_CUBIC}

#: a strip of rows is warped with one affine transform where that reproduces its map this well (px)
STRIP_TOLERANCE_PX = 0.01


@dataclass
class StripAffines:
    """One affine transform per tile of output rows and columns, where it reproduces the map.

    A tile spans the output rows between two neighbouring coarse rows of a
    `WarpMap` and the columns between two coarse columns ``columns`` cells apart
    (the whole width when that fits). Inside it the map is bilinear in the
    coarse samples, so an affine transform fitted to the tile's samples misses
    the map at most by its largest miss at a sample (a bilinear function's
    extremes on a rectangle lie at its corners). Each entry of ``tiles`` is
    ``(row0, row1, col0, col1, matrix or None)``: the matrix maps (column -
    col0, row - row0) of the tile to the source (cv2.warpAffine's inverse map);
    None where no affine transform is within the tolerance.
    """

    tiles: list

    @classmethod
    def of(cls, wm: "WarpMap", width: int, height: int, subsample=(1, 1),
           tolerance: float = STRIP_TOLERANCE_PX, narrow: int = 8) -> "StripAffines":
        fx, fy = subsample
        ax, ay = wm._absolute_coarse(fx, fy)
        cx, cy = wm.cell / fx, wm.cell / fy
        gh, gw = ax.shape
        xs = -cx / 2.0 - 0.5 + np.arange(gw) * cx  # plane columns and rows of the coarse samples
        ys = -cy / 2.0 - 0.5 + np.arange(gh) * cy
        row_edges = np.clip(np.ceil(ys), 0, height).astype(int)
        col_edges = np.clip(np.ceil(xs), 0, width).astype(int)
        col_edges[-1] = width
        first_rows = row_edges[:-1]
        coefs, misses = _tile_affines(ax, ay, xs, cy, 0, gw - 1)
        whole = _tile_matrices(coefs, xs[0], ys[:-1], np.zeros_like(first_rows), first_rows)
        spans = [(j0, min(j0 + narrow, gw - 1)) for j0 in range(0, gw - 1, narrow)]
        narrow_fits = None  # per span: (matrices, misses) of every strip, made when some strip needs them
        tiles = []
        for i, miss in enumerate(misses):
            r0, r1 = row_edges[i], row_edges[i + 1]
            if r1 <= r0:
                continue
            if miss <= tolerance:
                tiles.append((r0, r1, 0, width, whole[i]))
                continue
            if narrow_fits is None:
                narrow_fits = []
                for j0, j1 in spans:
                    span_coefs, span_misses = _tile_affines(ax, ay, xs, cy, j0, j1)
                    first_cols = np.full_like(first_rows, col_edges[j0])
                    narrow_fits.append((_tile_matrices(span_coefs, xs[j0], ys[:-1], first_cols, first_rows),
                                        span_misses))
            for (j0, j1), (matrices, span_misses) in zip(spans, narrow_fits):
                c0, c1 = col_edges[j0], col_edges[j1]
                if c1 <= c0:
                    continue
                if span_misses[i] <= tolerance:
                    tiles.append((r0, r1, c0, c1, matrices[i]))
                elif tiles and tiles[-1][4] is None and tiles[-1][:2] == (r0, r1) and tiles[-1][3] == c0:
                    tiles[-1] = (r0, r1, tiles[-1][2], c1, None)  # one remap for neighbouring misses
                else:
                    tiles.append((r0, r1, c0, c1, None))
        return cls(tiles)


def _tile_affines(ax, ay, xs, cell_y, j0, j1):
    """Least-squares affine transforms (strips, 3, 2) of the samples in columns j0..j1 of each pair
    of neighbouring rows of (ax, ay), x counted from xs[j0] and y from the upper row; and each
    one's largest miss (strips,)."""
    x = xs[j0:j1 + 1] - xs[j0]
    ones = np.ones_like(x)
    design = np.concatenate([np.stack([x, 0 * x, ones], 1), np.stack([x, cell_y * ones, ones], 1)])
    cols = slice(j0, j1 + 1)
    target = np.concatenate([np.stack([ax[:-1, cols], ay[:-1, cols]], -1),
                             np.stack([ax[1:, cols], ay[1:, cols]], -1)], axis=1).astype(np.float64)
    coef = np.linalg.pinv(design) @ target  # (strips, 3, 2): one small product per strip, batched
    miss = np.abs(design @ coef - target).max(axis=(1, 2))
    return coef, miss


def _tile_matrices(coefs, x_origin, y_origin, col0, row0) -> np.ndarray:
    """cv2.warpAffine's 2x3 inverse maps (tiles, 2, 3) for tiles whose first pixels are (col0, row0).

    ``coefs`` (tiles, 3, 2) from `_tile_affines`; the origins and first pixels are per tile."""
    m = np.swapaxes(coefs, 1, 2).copy()  # rows: source x, source y; columns: x, y, 1
    m[:, :, 2] += m[:, :, 0] * (np.asarray(col0) - x_origin)[:, None] \
        + m[:, :, 1] * (np.asarray(row0) - y_origin)[:, None]
    return m


def warp_plane(plane: np.ndarray, wm: "WarpMap", subsample=(1, 1), border: str = "edge", fill=0,
               interpolation: str = "cubic", dst: np.ndarray | None = None, pool=None,
               strips: StripAffines | None = None) -> np.ndarray:
    """`remap_plane` of ``plane`` through ``wm``, strip by strip where the map is affine there.

    Within a strip of 32 rows the map a rolling-shutter correction makes is nearly
    affine (a shift, a shear and a little roll or zoom); `StripAffines` finds where it
    is within `STRIP_TOLERANCE_PX`, and those strips go through cv2.warpAffine, which
    works out the source coordinates as it goes instead of reading two full-size maps.
    A strip that is not is cut into tiles 8 cells wide, each tried the same way (a wide
    lens's perspective is nearly affine over a few hundred pixels); the tiles left (a
    fast change of roll, strong distortion) are remapped from the full maps, made only
    when some tile needs them. Both use the same
    interpolation and border, so the two paths agree within OpenCV's fixed-point
    sampling (1/32 px). ``strips``: `StripAffines.of` the same map and plane size, when
    several planes share it (U and V). Cubic goes through float32 (`_TileWriter`).
    """
    h, w = plane.shape[:2]
    out = np.empty_like(plane) if dst is None else dst
    mode = cv2.BORDER_CONSTANT if border == "black" else cv2.BORDER_REPLICATE
    interp = INTERPOLATIONS[interpolation]
    maps = None
    strips = strips or StripAffines.of(wm, w, h, subsample)
    tile_rows = max((r1 - r0 for r0, r1, *_ in strips.tiles), default=0)
    writer = _TileWriter(plane, out, interpolation, tile_rows, pool)
    for r0, r1, c0, c1, matrix in strips.tiles:
        target = writer.target(r0, r1, c0, c1)
        if matrix is not None:
            cv2.warpAffine(writer.source, matrix, (int(c1 - c0), int(r1 - r0)), dst=target,
                           flags=interp | cv2.WARP_INVERSE_MAP, borderMode=mode, borderValue=fill)
        else:
            if maps is None:
                maps = wm.full(w, h, subsample, pool=pool)
            cv2.remap(writer.source, maps[0][r0:r1, c0:c1], maps[1][r0:r1, c0:c1], interp, dst=target,
                      borderMode=mode, borderValue=fill)
        writer.store(target, r0, r1, c0, c1)
    writer.release()
    if maps is not None and pool is not None:
        pool.give(maps[0].base, maps[1].base)
    return out


def remap_plane(plane: np.ndarray, map_x: np.ndarray, map_y: np.ndarray, border: str = "edge", fill=0,
                interpolation: str = "cubic", dst: np.ndarray | None = None) -> np.ndarray:
    """Resample one plane (uint8/uint16/float32, 1-4 channels) at its own depth.

    ``cubic`` is OpenCV's cubic convolution (Keys, 1981), worked in float32
    (`_TileWriter`); ``linear`` is bilinear.
    ``dst``, if given, receives the result (same shape and dtype as ``plane``).
    """
    mode = cv2.BORDER_CONSTANT if border == "black" else cv2.BORDER_REPLICATE
    out = np.empty_like(plane) if dst is None else dst
    h, w = plane.shape[:2]
    writer = _TileWriter(plane, out, interpolation, h)
    target = writer.target(0, h, 0, w)
    cv2.remap(writer.source, map_x, map_y, INTERPOLATIONS[interpolation], dst=target, borderMode=mode,
              borderValue=fill)
    writer.store(target, 0, h, 0, w)
    return out


_SATURATING = {np.dtype(np.uint8): cv2.CV_8U, np.dtype(np.uint16): cv2.CV_16U}


class _TileWriter:
    """Where the tiles of a resampled plane are read from and written to.

    OpenCV's cubic convolution runs faster on float32 than on 8- or 16-bit
    planes (one thread, a 1080p plane: about 12 against 15-16 ms), and the
    result, rounded and saturated back to the plane's depth, is the same to the
    code value (tests/test_warp.py; DEVELOPERS.md). So for cubic on such a plane
    the source is a float32 copy, each tile is resampled into a float32 scratch
    of ``tile_rows`` rows and converted into ``out`` (both conversions together
    cost well under 1 ms a 1080p plane). Linear is faster at the plane's own
    depth, so it and float planes are read and written in place.
    """

    def __init__(self, plane: np.ndarray, out: np.ndarray, interpolation: str, tile_rows: int, pool=None):
        self.out, self.pool = out, pool
        self.depth = _SATURATING.get(plane.dtype) if interpolation == "cubic" else None
        self.source, self.scratch = plane, None
        if self.depth is not None:
            self.source = self._take(plane.shape)
            np.copyto(self.source, plane)
            self.scratch = self._take((tile_rows,) + plane.shape[1:])

    def _take(self, shape) -> np.ndarray:
        return np.empty(shape, np.float32) if self.pool is None else self.pool.take(shape, np.float32)

    def target(self, r0, r1, c0, c1) -> np.ndarray:
        """The array the tile (rows r0:r1, columns c0:c1 of the output) is resampled into."""
        if self.depth is None:
            return self.out[r0:r1, c0:c1]
        return self.scratch[:r1 - r0, :c1 - c0]

    def store(self, target: np.ndarray, r0, r1, c0, c1) -> None:
        """Put a resampled tile into the output (rounded to nearest and saturated, as cv2 does)."""
        if self.depth is not None:
            cv2.add(target, 0.0, dst=self.out[r0:r1, c0:c1], dtype=self.depth)

    def release(self) -> None:
        if self.depth is not None and self.pool is not None:
            self.pool.give(self.source, self.scratch)


def outside_matte(map_x: np.ndarray, map_y: np.ndarray) -> np.ndarray:
    """True where an output pixel has no source pixel (filled by the border policy)."""
    h, w = map_x.shape
    return (map_x < -0.5) | (map_x > w - 0.5) | (map_y < -0.5) | (map_y > h - 0.5)
