"""Motion models: how the camera's motion moves the picture, behind one interface.

A motion model (a `MotionKind`) says

* what its curves are (``curves``: names with units, as the motion file writes them),
* how a point of the world is imaged at a time (``to_image``) and where an image
  point comes from (``to_world``), given the curves' values at that time,
* the residual and Jacobian of a track constraint between two timed
  observations (``constraint``),
* which curves carry its gauge (``gauge``: pinned at a shot's first frame, or
  carried over from the previous stretch of a streamed clip),
* a robust first guess of which tracks of a pair are the background
  (``pair_inliers``),
* how it writes its own parameters into the motion file and reads them back
  (``parameters`` / ``from_parameters``), and how its curves read for people
  (``describe``: CSV columns and report plots).

Correction and reskew maps (`skewfix.warp`) and the spline fit
(`skewfix.motion`) are written once against this interface. Adding a model is
one module with a `MotionKind` subclass and a `register` call here.

The two models:

``similarity`` (`skewfix.models.similarity`)
    pan, tilt, roll and zoom of the picture about its centre: a narrow lens, or
    any lens while the camera mostly pans.
``rotation`` (`skewfix.models.rotation`)
    a camera turning about its centre with a known (or estimated) focal length
    and optional radial distortion: wide lenses, where a turning camera moves
    the edges of the frame faster than its centre.
"""

from __future__ import annotations

from skewfix.models.base import MotionKind, kind_from_parameters, make_kind, register, registered_kinds
from skewfix.models import similarity as _similarity  # noqa: F401  (registers "similarity")
from skewfix.models import rotation as _rotation  # noqa: F401  (registers "rotation")

__all__ = ["MotionKind", "make_kind", "kind_from_parameters", "register", "registered_kinds"]
