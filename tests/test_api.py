"""The Python interface: its documented examples run, and importing skewfix stays light."""

from __future__ import annotations

import doctest
import os
import subprocess
import sys

import numpy as np
import pytest

import skewfix
import skewfix.api


def test_the_documented_examples_run_and_print_what_they_say():
    # the examples check facts stated beside them (skew = speed x readout; a 100 Hz light's
    # bands; a scikit-image photograph panned 20 px a frame); doctest is the reference runner
    result = doctest.testmod(skewfix.api, optionflags=doctest.ELLIPSIS)
    assert result.failed == 0
    assert result.attempted >= 40  # every example block was found


def test_every_public_name_is_documented_with_numpydoc_sections():
    # numpydoc's section names (the docstring standard scikit-image follows)
    for name in ("correct", "measure_readout", "load_motion", "steady_pan", "reskew_image"):
        doc = getattr(skewfix, name).__doc__
        assert "Parameters\n    ----------" in doc and "Returns\n    -------" in doc, name
    assert "Examples\n    --------" in skewfix.Motion.__doc__


def test_reskew_image_keeps_dtype_and_many_channels():
    pan = skewfix.steady_pan(64, 48, 2, 25, 0.02, (500.0, 0.0))
    image = np.random.default_rng(0).uniform(-1, 30000, (48, 64, 6)).astype(np.float16)
    out = skewfix.reskew_image(image, pan, 1)
    assert out.dtype == np.float16 and out.shape == image.shape
    # every channel is resampled the same way: channel 5 alone gives channel 5 of the stack
    alone = skewfix.reskew_image(np.ascontiguousarray(image[..., 5]), pan, 1)
    np.testing.assert_array_equal(out[..., 5], alone)
    from skewfix.errors import InputError

    with pytest.raises(InputError):
        pan.index(3)  # frames 1 and 2 only


def test_import_and_help_do_not_load_the_heavy_libraries():
    # common practice: a command line's start-up should not pay for what it does not use
    code = ("import sys, skewfix\n"
            "heavy = ('scipy.sparse', 'matplotlib', 'dask', 'skewfix.api', 'OpenEXR')\n"
            "assert not [m for m in heavy if m in sys.modules], sys.modules.keys()\n"
            "from skewfix.cli import main\n"
            "try:\n    main(['--help'])\nexcept SystemExit:\n    pass\n"
            "print([m for m in heavy if m in sys.modules])\n")
    env = dict(os.environ, PYTHONPATH=os.pathsep.join(sys.path))
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, env=env, timeout=60)
    assert out.returncode == 0, out.stderr[-2000:]
    assert out.stdout.strip().splitlines()[-1] == "[]"
