"""OpenEXR plates and maps, normalized maps, CG with overscan, and one frame numbering.

Plates are rendered by tests/truth.py (the published row-clock formula, no skewfix code)
from scikit-image's bundled photographs, kept in float and scaled past 1.0 like a
scene-linear plate with highlights.
"""

from __future__ import annotations

import csv

import numpy as np
import OpenEXR
import pytest

import truth
from conftest import run_cli as run, write_sequence

W, H, N, FPS = 320, 180, 10, 24
READOUT = 0.020
PAN_PX_PER_FRAME = 8.0
HDR_SCALE = 4.0 / 255.0  # the photographs' 0..255 to scene-linear 0..4


def write_exr_frame(path, channels: dict, pixel_type=np.float16) -> None:
    """Write with the OpenEXR bindings directly (the reference writer, not skewfix's)."""
    header = {"compression": OpenEXR.ZIP_COMPRESSION, "type": OpenEXR.scanlineimage}
    with OpenEXR.File(header, {k: np.asarray(v, pixel_type) for k, v in channels.items()}) as f:
        f.write(str(path))


def read_exr_channels(path) -> dict:
    with OpenEXR.File(str(path), separate_channels=True) as f:
        return {name: channel.pixels for name, channel in f.channels().items()}


@pytest.fixture(scope="module")
def hdr_plate(tmp_path_factory):
    """A steady pan over photographs as a half-float RGBA EXR plate numbered from 1001."""
    folder = tmp_path_factory.mktemp("exr")
    clip = truth.PlanarClip(W, H, N, FPS, READOUT, truth.steady_pan(PAN_PX_PER_FRAME, fps=FPS), seed=0)
    for k in range(N):
        rgb = clip.view(clip.row_times(k)) * HDR_SCALE
        write_exr_frame(folder / f"plate.{1001 + k:04d}.exr",
                        {"R": rgb[..., 0], "G": rgb[..., 1], "B": rgb[..., 2], "A": np.ones((H, W))})
    return folder, clip


def test_fix_of_a_float_plate_is_closer_to_the_truth_and_stays_float(hdr_plate, tmp_path, capsys):
    folder, clip = hdr_plate
    code, err = run(capsys, "fix", folder / "plate.%04d.exr", tmp_path / "fixed.%04d.exr", "--fps", FPS,
                    "--readout", f"{READOUT * 1e3}ms", "--save-maps", tmp_path / "maps", "--map-format", "exr",
                    "--save-motion-csv", tmp_path / "m.csv", "--quiet")
    assert code == 0, err
    numbers = sorted(int(p.name.split(".")[1]) for p in tmp_path.glob("fixed.*.exr"))
    assert numbers == list(range(1001, 1001 + N))  # numbered like the input sequence
    errors_before, errors_after = [], []
    for k in range(2, N - 2):
        out = read_exr_channels(tmp_path / f"fixed.{1001 + k:04d}.exr")
        assert {name: a.dtype for name, a in out.items()} == {c: np.float16 for c in "RGBA"}  # half kept
        shot = read_exr_channels(folder / f"plate.{1001 + k:04d}.exr")
        # truth: every row at the middle row's instant (published row clock, tests/truth.py)
        t_ref = clip.frame_times[k] + READOUT * (H - 1) / 2 / H
        want = clip.view(np.full(H, t_ref))[..., 0] * HDR_SCALE
        inner = np.s_[H // 6: -H // 6, W // 6: -W // 6]
        errors_before.append(np.abs(shot["R"].astype(float) - want)[inner].mean())
        errors_after.append(np.abs(out["R"].astype(float) - want)[inner].mean())
        assert out["R"].max() > 1.5  # scene-linear highlights above 1.0 are not clipped
        np.testing.assert_array_equal(out["A"], 1.0)  # alpha carried through the remap
    assert np.mean(errors_after) < 0.3 * np.mean(errors_before), (errors_before, errors_after)
    # the warp maps as 2-channel float EXR: R holds x, G holds y, numbered like the plate
    correct = read_exr_channels(tmp_path / "maps" / "correct_map.1005.exr")
    assert set(correct) == {"R", "G"} and correct["R"].dtype == np.float32
    # a pan to the right slants verticals: the correction reads the bottom row further left than
    # the top row by speed x readout x (H-1)/H (fact of the trade), here 192 px/s x 20 ms
    lean = float(np.mean(correct["R"][-1] - correct["R"][0]))
    assert lean == pytest.approx(-PAN_PX_PER_FRAME * FPS * READOUT * (H - 1) / H, abs=0.3)
    rows = list(csv.DictReader((tmp_path / "m.csv").open()))
    assert [int(r["frame"]) for r in rows] == list(range(1001, 1001 + N))  # the CSV counts like the files


def test_global_shutter_passes_extreme_half_values_through_bit_for_bit(tmp_path, capsys):
    # 65504 is the largest finite half (OpenEXR's half type, IEEE 754 binary16); values below 0
    # and above 1 are ordinary in scene-linear plates. A global shutter has nothing to correct
    # (fact of the trade), so every sample must come back exactly, in its own pixel type.
    rng = np.random.default_rng(3)
    for k in range(4):
        base = rng.uniform(-2.0, 2.0e4, (48, 64))
        base[0, 0], base[0, 1], base[0, 2] = 65504.0, -65504.0, 6.1e-5  # smallest normal half
        depth = rng.uniform(0, 1e6, (48, 64))  # a FLOAT channel beyond half's range
        header = {"compression": OpenEXR.PIZ_COMPRESSION, "type": OpenEXR.scanlineimage}
        channels = {"R": base.astype(np.float16), "G": base[::-1].astype(np.float16),
                    "B": base[:, ::-1].astype(np.float16), "Z": depth.astype(np.float32)}
        with OpenEXR.File(header, channels) as f:
            f.write(str(tmp_path / f"cg.{k + 1:04d}.exr"))
    code, err = run(capsys, "fix", tmp_path / "cg.%04d.exr", tmp_path / "out.%04d.exr", "--fps", 24,
                    "--readout", "0", "--model", "similarity", "--quiet")
    assert code == 0, err
    for k in range(4):
        a = read_exr_channels(tmp_path / f"cg.{k + 1:04d}.exr")
        b = read_exr_channels(tmp_path / f"out.{k + 1:04d}.exr")
        assert {n: x.dtype for n, x in b.items()} == {n: x.dtype for n, x in a.items()}
        for name in a:
            np.testing.assert_array_equal(a[name], b[name])
        with OpenEXR.File(str(tmp_path / f"out.{k + 1:04d}.exr"), header_only=True) as f:
            assert f.header()["compression"] == OpenEXR.PIZ_COMPRESSION  # the input's compression kept


def test_an_integer_sequence_becomes_half_floats_of_its_code_values(tmp_path, capsys):
    # 8-bit code value v is v / 255 (full-range scaling, as ITU-R BT.709 codes full-range RGB)
    from skimage import data

    photo = data.astronaut()[:96, :128]
    write_sequence(tmp_path, "p.{:04d}.png", [photo, photo, photo], first=7)
    code, err = run(capsys, "fix", tmp_path / "p.%04d.png", tmp_path / "o.%04d.exr", "--fps", 25,
                    "--readout", "0", "--model", "similarity", "--quiet")
    assert code == 0, err
    out = read_exr_channels(tmp_path / "o.0007.exr")
    assert out["R"].dtype == np.float16
    np.testing.assert_allclose(out["G"].astype(float), photo[..., 1] / 255.0, atol=2.5e-4)  # half's spacing


def test_a_float_plate_is_never_written_to_integer_files(hdr_plate, tmp_path, capsys):
    folder, _ = hdr_plate
    code, err = run(capsys, "fix", folder / "plate.%04d.exr", tmp_path / "o.%04d.tif", "--fps", FPS,
                    "--readout", "20ms")
    assert code == 2 and "clipped" in err and len(err.strip().splitlines()) == 1 and "Traceback" not in err
    assert not list(tmp_path.iterdir())
    code, err = run(capsys, "fix", folder / "plate.%04d.exr", tmp_path / "o.%04d.exr", "--fps", FPS,
                    "--readout", "20ms", "--depth", "8")
    assert code == 2 and "16 (half) or 32 (float)" in err


def test_normalized_maps_put_the_origin_bottom_left(tmp_path, capsys):
    # With a global shutter the map is the identity. Normalized maps run 0..1 across the frame
    # from its bottom-left corner, y up (the convention the README states; compositing tools
    # commonly load maps so): pixel centre (x, y) is ((x + 0.5) / W, 1 - (y + 0.5) / H).
    from skimage import data

    photo = data.astronaut()[:90, :160]
    write_sequence(tmp_path, "p.{:04d}.png", [photo, photo], first=1)
    code, err = run(capsys, "fix", tmp_path / "p.%04d.png", tmp_path / "o.%04d.png", "--fps", 25,
                    "--readout", "0", "--save-maps", tmp_path / "maps", "--map-format", "exr",
                    "--map-units", "normalized", "--model", "similarity", "--quiet")
    assert code == 0, err
    m = read_exr_channels(tmp_path / "maps" / "correct_map.0001.exr")
    h, w = m["R"].shape
    ys, xs = np.mgrid[0:h, 0:w]
    np.testing.assert_allclose(m["R"], (xs + 0.5) / w, atol=1e-6)
    np.testing.assert_allclose(m["G"], 1.0 - (ys + 0.5) / h, atol=1e-6)
    code, err = run(capsys, "fix", tmp_path / "p.%04d.png", tmp_path / "x.%04d.png", "--fps", 25,
                    "--readout", "0", "--map-units", "normalized")
    assert code == 2 and "--save-maps" in err


def test_overscan_cg_gets_the_shutter_over_its_whole_frame(hdr_plate, tmp_path, capsys):
    folder, _ = hdr_plate
    code, err = run(capsys, "fix", folder / "plate.%04d.exr", tmp_path / "fixed.%04d.exr", "--fps", FPS,
                    "--readout", f"{READOUT * 1e3}ms", "--save-motion", tmp_path / "m.json", "--quiet")
    assert code == 0, err
    cw, ch = 352, 198  # the plate x 1.1, centred: 16 and 9 px on each side
    bar = np.zeros((ch, cw), np.float32)
    bar[:, 174:178] = 10.0  # a vertical bar, brighter than 1
    for k in range(N):
        write_exr_frame(tmp_path / f"cg.{1001 + k:04d}.exr", {"R": bar, "G": bar, "B": bar, "A": bar > 0})
    code, err = run(capsys, "reskew", tmp_path / "cg.%04d.exr", tmp_path / "no.%04d.exr", "--motion",
                    tmp_path / "m.json")
    assert code == 1 and "--overscan 1.1" in err and len(err.strip().splitlines()) == 1
    for option, name in (("1.1", "a"), ("16,9px", "b")):
        code, err = run(capsys, "reskew", tmp_path / "cg.%04d.exr", tmp_path / f"{name}.%04d.exr", "--motion",
                        tmp_path / "m.json", "--overscan", option, "--quiet")
        assert code == 0, err
    a, b = (read_exr_channels(tmp_path / f"{n}.1005.exr")["R"].astype(float) for n in ("a", "b"))
    assert a.shape == (ch, cw)  # the output keeps the CG's size
    np.testing.assert_array_equal(a, b)  # the factor and the margin say the same
    cols = np.arange(cw)
    centre = (a * cols).sum(axis=1) / a.sum(axis=1)
    # rows beyond the plate continue the row clock: from the CG's top row (plate row -9) to its
    # bottom row (plate row 188) the lean is speed x readout x 197 / 180 (published row clock)
    speed = PAN_PX_PER_FRAME * FPS
    assert centre[0] - centre[-1] == pytest.approx(speed * READOUT * (ch - 1) / H, abs=0.25)
    # the plate's middle row is the reference instant: the bar stays where it was there
    assert centre[ch // 2] == pytest.approx(175.5, abs=0.3)
    assert a.max() > 9.0  # values above 1 kept
    code, err = run(capsys, "reskew", tmp_path / "cg.%04d.exr", tmp_path / "c.%04d.exr", "--motion",
                    tmp_path / "m.json", "--overscan", "1.2")
    assert code == 1 and "overscan 1.2" in err


def test_a_video_numbers_its_frames_from_one_everywhere(clip_factory, tmp_path, capsys):
    # one convention (README, "Frame numbers"): sequences, maps, CSV and preview agree
    src, _, _ = clip_factory("whip", 0.02, n_frames=8)
    code, err = run(capsys, "fix", src, tmp_path / "f.%04d.png", "--readout", "20ms", "--save-maps",
                    tmp_path / "maps", "--save-motion-csv", tmp_path / "m.csv", "--quiet")
    assert code == 0, err
    assert sorted(p.name for p in tmp_path.glob("f.*.png"))[0] == "f.0001.png"
    assert sorted(p.name for p in (tmp_path / "maps").glob("correct_map.*"))[0] == "correct_map.0001.tif"
    frames = [int(r["frame"]) for r in csv.DictReader((tmp_path / "m.csv").open())]
    assert frames == list(range(1, 9))
    code, err = run(capsys, "preview", src, "--readout", "20ms", "--frame", 8, "--out", tmp_path / "s.png")
    assert code == 0 and "frame 8" in err, err
    code, err = run(capsys, "preview", src, "--readout", "20ms", "--frame", 0, "--out", tmp_path / "t.png")
    assert code == 1 and "8 frames (1 to 8)" in err and not (tmp_path / "t.png").exists()


def test_a_damaged_or_multi_part_exr_is_refused_in_one_line(hdr_plate, tmp_path, capsys):
    # README, "When something is wrong": one line, a non-zero exit, nothing written
    folder, _ = hdr_plate
    plate = tmp_path / "plate"
    plate.mkdir()
    for k in range(3):
        (plate / f"p.{k + 1:04d}.exr").write_bytes((folder / f"plate.{1001 + k:04d}.exr").read_bytes())
    (plate / "p.0002.exr").write_bytes(b"v/1\x01" + b"\0" * 64)  # the OpenEXR magic number, then nothing
    out = tmp_path / "out"
    out.mkdir()
    code, err = run(capsys, "fix", plate / "p.%04d.exr", out / "o.%04d.exr", "--fps", 24, "--readout", "20ms")
    assert code == 1 and "p.0002.exr" in err and "OpenEXR" in err and len(err.strip().splitlines()) == 1
    assert not list(out.iterdir())
    parts = [OpenEXR.Part({}, {"R": np.zeros((8, 8), np.float16)}) for _ in range(2)]
    with OpenEXR.File(parts) as f:  # two images in one file (OpenEXR 2's multi-part files)
        f.write(str(plate / "p.0002.exr"))
    code, err = run(capsys, "fix", plate / "p.%04d.exr", out / "o.%04d.exr", "--fps", 24, "--readout", "20ms")
    assert code == 1 and "multi-part" in err and not list(out.iterdir())
