"""skewfix: measure and remove rolling-shutter skew in footage."""

import os as _os

__version__ = "0.1.0"

# skewfix runs its own threads (decode, fit, warp, encode) and its matrix work
# is small: a BLAS thread pool beside them only spins. Takes effect when
# skewfix is imported before NumPy (as by the command line); a caller's own
# setting wins.
_os.environ.setdefault("OPENBLAS_NUM_THREADS", "1")
