"""skewfix: measure and remove rolling-shutter skew in footage.

The Python interface (documented in `skewfix.api`, loaded on first use so that
``import skewfix`` and the command line stay quick):

* ``skewfix.correct(input, output, readout, ...)`` — correct a clip or sequence;
* ``skewfix.measure_readout(clip, method=..., ...)`` — measure a readout time;
* ``skewfix.load_motion(path)`` — a motion file as a ``skewfix.Motion``: curves
  and correction/reskew maps at any frame; ``skewfix.steady_pan(...)`` makes one;
* ``skewfix.reskew_image(image, motion, frame)`` and
  ``skewfix.correct_image(image, motion, frame)`` — apply a motion to arrays.
"""

import os as _os

__version__ = "0.1.0"

# skewfix runs its own threads (decode, fit, warp, encode) and its matrix work
# is small: a BLAS thread pool beside them only spins. Takes effect when
# skewfix is imported before NumPy (as by the command line); a caller's own
# setting wins.
_os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")

__all__ = ["correct", "measure_readout", "load_motion", "Motion", "steady_pan", "reskew_image", "correct_image"]


def __getattr__(name):
    """Load the Python interface (`skewfix.api`) when one of its names is first used."""
    if name in __all__:
        from skewfix import api

        return getattr(api, name)
    raise AttributeError(f"module 'skewfix' has no attribute {name!r}")


def __dir__():
    return sorted(list(globals()) + __all__)
