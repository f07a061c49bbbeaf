"""The motion-model interface (`MotionKind`) and the registry of models.

Conventions shared by every model:

* ``values`` are the model's curves evaluated at each point's own time, an
  array of shape ``(n_curves, ...)`` broadcasting with the point arrays;
* image points are stored-frame pixels (origin top-left, pixel centres at
  integer coordinates);
* a "world" point is whatever the model needs to stay fixed while the camera
  moves (a point on a plane for the similarity, a direction for the rotation),
  as a tuple of arrays.

The default `MotionKind.constraint` is the *transfer error*: the track's first
observation is taken to the world at its time and imaged again at the second
observation's time; the residual is the difference from where it was seen, in
pixels. Its Jacobian is taken by central differences in the curve values (the
curves enter each point through a few numbers, so this costs a handful of
vectorised evaluations, not a pass over the spline).
"""

from __future__ import annotations

import hashlib
import threading
from collections import OrderedDict
from typing import Callable

import numpy as np

_REGISTRY: dict[str, Callable[..., "MotionKind"]] = {}


class MotionKind:
    """What a motion model must say; see the package docstring."""

    #: registry name ("similarity", "rotation")
    name: str = ""
    #: curve names as the motion file writes them (with their units)
    curves: tuple[str, ...] = ()
    #: curves pinned at a shot's first frame (the world's own frame is free)
    gauge: tuple[int, ...] = ()
    #: curves the fit may move (a translation-only similarity keeps roll and zoom at 0)
    active: tuple[int, ...] = ()
    #: parameters beyond the curves that the fit has to estimate (for model choice)
    extra_parameters: int = 0

    def __init__(self, width: int, height: int):
        self.width, self.height = int(width), int(height)

    @property
    def n_curves(self) -> int:
        return len(self.curves)

    @property
    def centre(self) -> tuple[float, float]:
        return ((self.width - 1) / 2.0, (self.height - 1) / 2.0)

    # -- geometry -----------------------------------------------------------
    def to_world(self, values, px, py) -> tuple:
        """The world point seen at image point (px, py) when the curves have ``values``."""
        raise NotImplementedError

    def to_image(self, values, world) -> tuple[np.ndarray, np.ndarray]:
        """Where ``world`` is imaged when the curves have ``values`` (NaN where it is not)."""
        raise NotImplementedError

    def transfer(self, values0, p0, values1) -> tuple[np.ndarray, np.ndarray]:
        """Image position at ``values1`` of what was seen at ``p0`` at ``values0``."""
        return self.to_image(values1, self.to_world(values0, p0[..., 0], p0[..., 1]))

    # -- fitting ------------------------------------------------------------
    def curve_scales(self) -> np.ndarray:
        """Pixels per unit of each curve, so one smoothness weight serves them all."""
        return np.ones(self.n_curves)

    def constraint(self, values0, p0, values1, p1):
        """Residual (n, m) of the tracks (p0 at values0, p1 at values1) and its Jacobians
        (n, m, n_curves) with respect to values0 and values1."""
        return transfer_constraint(self, values0, p0, values1, p1)

    def pair_inliers(self, p0: np.ndarray, p1: np.ndarray, threshold: float = 3.0) -> np.ndarray | None:
        """Which tracks of one frame pair a single global motion explains (RANSAC;
        Fischler & Bolles, 1981), as 0/1 weights; None when that cannot be told."""
        raise NotImplementedError

    def inlier_key(self) -> tuple:
        """What `pair_inliers` depends on besides the points: kinds with equal keys find the
        same inliers (a memo of each pair's motions is shared between them)."""
        return (type(self).__name__,)

    def initial_frame_values(self, pairs, clock, first: int, last: int, start_values):
        """A rough (times, values (n_curves, n)) per frame to start the fit from, for
        models that are not close to linear in their curves; None starts from
        ``start_values`` everywhere."""
        return None

    # -- describing ---------------------------------------------------------
    def parameters(self) -> dict:
        """The model's own parameters for the motion file (beyond the curves)."""
        return {}

    def describe(self, values) -> dict[str, np.ndarray]:
        """The curves in units people read (CSV columns, report plots), keyed by label."""
        return {name: np.asarray(v) for name, v in zip(self.curves, values)}

    def summary(self) -> str:
        """One phrase for notes and reports."""
        return self.name

    def __repr__(self) -> str:
        return f"{type(self).__name__}({self.width}x{self.height}, {self.parameters()})"


def transfer_constraint(kind: MotionKind, values0, p0, values1, p1, step_px: float = 1e-3):
    """Transfer-error residual and its central-difference Jacobians (see module docstring)."""
    v0 = np.asarray(values0, dtype=np.float64)
    v1 = np.asarray(values1, dtype=np.float64)
    world = kind.to_world(v0, p0[:, 0], p0[:, 1])
    ix, iy = kind.to_image(v1, world)
    resid = np.stack([ix - p1[:, 0], iy - p1[:, 1]], 1)
    n, c = len(p0), kind.n_curves
    jac0 = np.zeros((n, 2, c))
    jac1 = np.zeros((n, 2, c))
    scales = kind.curve_scales()
    for j in kind.active:
        h = step_px / scales[j]  # a step that moves the picture by about step_px
        d = np.zeros((c, 1))
        d[j] = h
        a = kind.to_image(v1, kind.to_world(v0 + d, p0[:, 0], p0[:, 1]))
        b = kind.to_image(v1, kind.to_world(v0 - d, p0[:, 0], p0[:, 1]))
        jac0[:, 0, j] = (a[0] - b[0]) / (2 * h)
        jac0[:, 1, j] = (a[1] - b[1]) / (2 * h)
        a = kind.to_image(v1 + d, world)
        b = kind.to_image(v1 - d, world)
        jac1[:, 0, j] = (a[0] - b[0]) / (2 * h)
        jac1[:, 1, j] = (a[1] - b[1]) / (2 * h)
    return resid, jac0, jac1


def register(name: str, factory: Callable[..., MotionKind]) -> None:
    """Make a model available by name (``--model NAME``, motion files)."""
    _REGISTRY[name] = factory


def registered_kinds() -> tuple[str, ...]:
    return tuple(_REGISTRY)


def make_kind(name: str, width: int, height: int, **parameters) -> MotionKind:
    """A registered model for frames of the given size."""
    try:
        factory = _REGISTRY[name]
    except KeyError:
        raise ValueError(f"unknown motion model {name!r} (known: {', '.join(_REGISTRY)})") from None
    return factory(width, height, **parameters)


def kind_from_parameters(name: str, width: int, height: int, parameters: dict) -> MotionKind:
    """The model a motion file describes (``parameters`` as `MotionKind.parameters` wrote them)."""
    return make_kind(name, width, height, **(parameters or {}))


class PointsMemo:
    """A small thread-safe memo of results computed from point arrays, keyed by the arrays'
    bytes (and any other hashable parts): one pair's RANSAC motions are found once, however
    many fits (focal-length candidates, overlapping windows) ask for them.

    Only for deterministic computations, so that a value never depends on what ran before
    (OpenCV's RANSAC draws from a generator it seeds itself; the callers seed the shared one
    too, in case a version does not).
    """

    def __init__(self, size: int = 4096):
        self.size = size
        self._items: OrderedDict[bytes, object] = OrderedDict()
        self._lock = threading.Lock()

    @staticmethod
    def _key(parts) -> bytes:
        h = hashlib.blake2b(digest_size=20)
        for part in parts:
            if isinstance(part, np.ndarray):
                a = np.ascontiguousarray(part)
                h.update(f"{a.dtype.str}{a.shape}".encode())
                h.update(a.tobytes())
            else:
                h.update(repr(part).encode())
            h.update(b"|")
        return h.digest()

    def clear(self) -> None:
        with self._lock:
            self._items.clear()

    def get(self, parts, compute: Callable[[], object]):
        key = self._key(parts)
        with self._lock:
            if key in self._items:
                self._items.move_to_end(key)
                return self._items[key]
        value = compute()
        with self._lock:
            self._items[key] = value
            while len(self._items) > self.size:
                self._items.popitem(last=False)
        return value
