"""Ctrl-C or a kill during `skewfix fix`: no OUTPUT, no temporary file, nothing touched.

`python -m skewfix fix` runs as a child process on a clip that takes a few
seconds; once its temporary output file appears beside OUTPUT (the run is in
full swing) it gets SIGINT or SIGTERM. Afterwards the folder must be byte for
byte as before: the input unchanged, no file at OUTPUT (or the earlier OUTPUT
unchanged when ``--force`` was given) and the temporary file gone.
"""

from __future__ import annotations

import os
import signal
import subprocess
import sys
import time
from fractions import Fraction
from pathlib import Path

import cv2
import numpy as np
import pytest

from skewfix.synth.shutter import write_rgb_clip
from test_bad_input import folder_state

WIDTH, HEIGHT, FRAMES = 640, 360, 60
# 128 + the signal's number: what a POSIX shell reports for a process its signal stopped
# (POSIX.1-2017, Shell Command Language, 2.8.2 Exit Status for Commands): 130 for
# SIGINT (Ctrl-C), 143 for SIGTERM
STOPPED_STATUS = {signal.SIGINT: 130, signal.SIGTERM: 143}
WAIT_S = 60.0  # generous bound for a busy machine; nothing is timed


@pytest.fixture(scope="module")
def long_clip(tmp_path_factory) -> Path:
    """A textured pan, big enough that correcting it at --preset slow takes seconds."""
    rng = np.random.default_rng(0)
    texture = cv2.GaussianBlur(rng.random((HEIGHT + 40, WIDTH + 8 * FRAMES, 3)).astype(np.float32), (0, 0), 2.0)
    texture = cv2.normalize(texture, None, 0, 255, cv2.NORM_MINMAX).astype(np.uint8)
    frames = (np.ascontiguousarray(texture[20:20 + HEIGHT, 8 * k:8 * k + WIDTH]) for k in range(FRAMES))
    path = tmp_path_factory.mktemp("long") / "long.mp4"
    write_rgb_clip(path, frames, Fraction(30), options={"preset": "ultrafast"})
    return path


def interrupt_fix(folder: Path, sig: int, *extra: str) -> tuple[int, str]:
    """Start a fix in ``folder``, send ``sig`` once its temporary file appears; (status, stderr)."""
    before = set(os.listdir(folder))
    child = subprocess.Popen(
        [sys.executable, "-m", "skewfix", "fix", "in.mp4", "out.mp4", "--readout", "10ms", "--preset", "slow",
         "--quiet", *extra],
        cwd=folder, stderr=subprocess.PIPE, text=True,
        # a child started from a background job inherits an ignored SIGINT; give it the default back
        preexec_fn=lambda: signal.signal(signal.SIGINT, signal.SIG_DFL))
    deadline = time.monotonic() + WAIT_S
    while not set(os.listdir(folder)) - before:
        if child.poll() is not None or time.monotonic() > deadline:
            child.kill()
            pytest.fail(f"the run ended (status {child.returncode}) before its temporary file could be seen: "
                        f"{child.communicate()[1]}")
        time.sleep(0.01)
    child.send_signal(sig)
    _, err = child.communicate(timeout=WAIT_S)
    return child.returncode, err


@pytest.mark.parametrize("sig", [signal.SIGINT, signal.SIGTERM], ids=["SIGINT", "SIGTERM"])
@pytest.mark.parametrize("earlier_output", [False, True], ids=["no-output-yet", "existing-output-with-force"])
def test_interrupted_fix_leaves_the_folder_as_it_was(long_clip, tmp_path, sig, earlier_output):
    (tmp_path / "in.mp4").write_bytes(long_clip.read_bytes())
    extra = ()
    if earlier_output:
        (tmp_path / "out.mp4").write_bytes(b"yesterday's render, to be kept unless a new one is complete")
        extra = ("--force",)
    before = folder_state(tmp_path)
    status, err = interrupt_fix(tmp_path, sig, *extra)
    assert status == STOPPED_STATUS[sig] == 128 + sig, err
    lines = err.strip().splitlines()
    assert "Traceback" not in err and len(lines) == 1 and "stopped" in lines[0], err
    assert folder_state(tmp_path) == before  # input and earlier OUTPUT byte-identical, no temp file
