"""`skewfix batch`: folders, clip lists, reruns, failures, and a Dask cluster on loopback."""

from __future__ import annotations

import hashlib
import json
import os
import shutil
from fractions import Fraction
from pathlib import Path

import pytest

from skewfix.batch import LEDGER_NAME, collect_jobs, run_batch
from skewfix.cli import main
from skewfix.errors import UsageProblem
from skewfix.synth.paths import WhipPan
from skewfix.synth.scenes import harbour_scene
from skewfix.synth.shutter import render_clip

WIDTH, HEIGHT, FRAMES = 160, 90, 6
GOOD = ("a_pan.mp4", "b_pan.mov")


@pytest.fixture(scope="module")
def rendered(tmp_path_factory) -> Path:
    """Two tiny rolling-shutter whip pans, one text file named .mp4, one non-video file."""
    folder = tmp_path_factory.mktemp("batch_src")
    scene = harbour_scene(140, 900)
    for i, name in enumerate(GOOD):
        render_clip(folder / name, scene, WhipPan(peak_px_s=300 + 100 * i, centre_s=0.12, duration_s=0.3),
                    WIDTH, HEIGHT, Fraction(25), FRAMES, 0.010, origin=(20, 20))
    (folder / "broken.mp4").write_text("this is not a video\n")
    (folder / "notes.txt").write_text("not a clip either, and not a video name\n")
    return folder


@pytest.fixture
def clips(rendered, tmp_path) -> Path:
    """A private copy of the rendered folder (tests may touch the inputs)."""
    return Path(shutil.copytree(rendered, tmp_path / "in"))


def digest(path: Path) -> str:
    return hashlib.sha256(path.read_bytes()).hexdigest()


def video_shape(path: Path) -> tuple[int, int, int]:
    import av

    with av.open(str(path)) as c:
        frames = list(c.decode(video=0))
    return len(frames), frames[0].width, frames[0].height


def by_name(outcomes):
    return {o.name: o for o in outcomes}


def test_folder_batch_reports_each_clip_and_a_rerun_skips_finished_ones(clips, tmp_path, capsys):
    out = tmp_path / "out"
    before = {p.name: digest(p) for p in clips.iterdir()}
    code = main(["batch", str(clips), "--out", str(out), "--readout", "10ms", "--workers", "2"])
    err = capsys.readouterr().err
    # common practice (POSIX): a run in which anything failed exits non-zero
    assert code == 1
    for name in GOOD:
        assert f"done  {name}: {FRAMES} frames" in err
        # the fixture rendered FRAMES frames of WIDTH x HEIGHT; common practice: a correction keeps both
        assert video_shape(out / name) == (FRAMES, WIDTH, HEIGHT)
    failed = [line for line in err.splitlines() if "failed  broken.mp4" in line]
    # the clip's own one-line error follows its name, and it is about reading that input
    assert len(failed) == 1 and str(clips / "broken.mp4") in failed[0].split(": ", 1)[1]
    assert "Traceback" not in err
    assert err.splitlines()[-1] == "skewfix: 1 of 3 clip(s) failed"
    # only video names are picked from a folder; nothing else appears in --out
    assert sorted(p.name for p in out.iterdir()) == sorted([LEDGER_NAME, *GOOD])
    assert {p.name: digest(p) for p in clips.iterdir()} == before  # inputs never touched

    stamps = {name: (out / name).stat().st_mtime_ns for name in GOOD}
    code = main(["batch", str(clips), "--out", str(out), "--readout", "10ms", "--quiet"])
    captured = capsys.readouterr()
    assert code == 1  # the broken clip still fails
    assert {name: (out / name).stat().st_mtime_ns for name in GOOD} == stamps  # not rewritten
    table = captured.out
    for name in GOOD:
        row = next(line for line in table.splitlines() if name in line)
        assert "skipped" in row and f" {FRAMES} " in row
    assert "failed" in next(line for line in table.splitlines() if "broken.mp4" in line)
    assert "skipped  " not in captured.err  # --quiet: no line per clip


def test_rerun_corrects_again_when_the_input_or_the_settings_change(clips, tmp_path):
    out = tmp_path / "out"
    first = by_name(run_batch(str(clips), str(out), {"readout": "10ms"}))
    assert [first[n].status for n in GOOD] == ["done", "done"]
    # common practice (make and rsync decide the same way): a new modification time means a new input
    os.utime(clips / GOOD[0], ns=(1_000_000_000, 1_000_000_000))
    second = by_name(run_batch(str(clips), str(out), {"readout": "10ms"}))
    assert (second[GOOD[0]].status, second[GOOD[1]].status) == ("done", "skipped")
    third = by_name(run_batch(str(clips), str(out), {"readout": "12ms"}))
    assert [third[n].status for n in GOOD] == ["done", "done"]
    assert "readout 12.000 ms" in third[GOOD[1]].message
    entries = [json.loads(line) for line in (out / LEDGER_NAME).read_text().splitlines()]
    assert entries[-1]["settings"] == {"readout": "12ms"}
    # the ledger agrees with the file system (os.stat) about what it recorded
    assert entries[-1]["output_size"] == Path(entries[-1]["output"]).stat().st_size


def test_an_output_the_batch_did_not_write_is_left_alone_unless_forced(clips, tmp_path):
    out = tmp_path / "out"
    out.mkdir()
    (out / GOOD[0]).write_text("someone else's file\n")
    outcomes = by_name(run_batch(str(clips), str(out), {"readout": "10ms"}))
    # common practice (as fix without --force): never overwrite a file the tool did not write
    assert outcomes[GOOD[0]].status == "failed" and "already exists" in outcomes[GOOD[0]].message
    assert (out / GOOD[0]).read_text() == "someone else's file\n"
    assert outcomes[GOOD[1]].status == "done"
    forced = by_name(run_batch(str(clips), str(out), {"readout": "10ms"}, force=True))
    assert forced[GOOD[0]].status == "done"
    assert video_shape(out / GOOD[0]) == (FRAMES, WIDTH, HEIGHT)


def test_clip_list_resolves_paths_and_applies_per_clip_settings(clips, tmp_path):
    shutil.copy(clips / GOOD[1], clips / "take two.mov")
    lists = tmp_path / "lists"
    lists.mkdir()
    (lists / "day1.txt").write_text(
        "# day one\n"
        "\n"
        f"../in/{GOOD[0]}\n"
        f'"../in/take two.mov"  graded/take2.mov  readout=4.5ms  line-order=bottom-up  crf=20\n'
        f"   # an indented comment\n"
        f"{clips / GOOD[1]}  b_lossless.mkv  codec=ffv1\n"
    )
    out = tmp_path / "out"
    outcomes = run_batch(str(lists / "day1.txt"), str(out), {"readout": "10ms"})
    # common practice: outcomes come back in list order, whatever order the workers finish in
    assert [o.name for o in outcomes] == [f"../in/{GOOD[0]}", "../in/take two.mov", str(clips / GOOD[1])]
    assert [o.status for o in outcomes] == ["done", "done", "done"]
    assert "readout 10.000 ms (top-down)" in outcomes[0].message   # the command-line default
    assert "readout 4.500 ms (bottom-up)" in outcomes[1].message  # the line's own settings
    assert video_shape(out / GOOD[0]) == (FRAMES, WIDTH, HEIGHT)
    assert video_shape(out / "graded" / "take2.mov") == (FRAMES, WIDTH, HEIGHT)
    import av

    with av.open(str(out / "b_lossless.mkv")) as c:  # codec=ffv1 reached the encoder (FFmpeg's codec name)
        assert c.streams.video[0].codec_context.name == "ffv1"


@pytest.mark.parametrize("lines, number, words", [
    (["a.mp4", "b.mp4 readout=-3ms"], 2, "must not be negative"),
    (["a.mp4 readout=3 ms"], 1, "'ms' follows readout=..."),
    (["a.mp4", "", "b.mp4 speed=2"], 3, "unknown setting 'speed'"),
    (["a.mp4 crf=99"], 1, "crf must be"),
    (["# c", "a.mp4 line-order=sideways"], 2, "line-order must be one of"),
    (['"a.mp4 readout=1ms'], 1, "quotes"),
    (["a.mp4 b.mp4 c.mp4"], 1, "found 3 paths"),
    (["a.mp4 readout=1ms x.mp4"], 1, "INPUT and OUTPUT come first"),
    (["a.mp4 out.mp4", "b.mp4 out.mp4"], 2, "as does a.mp4"),
    (["a.%04d.tif"], 1, "image sequences"),
    (["a.mp4 model=wobble"], 1, "model must be one of auto, similarity, rotation"),
    (["a.mp4", "b.mp4 hfov=0"], 2, "hfov must be between 1 and 179"),
    (["a.mp4 focal-length=26"], 1, "focal-length must be like 26mm"),
    (["a.mp4 lens-distortion=a,b"], 1, "lens-distortion must be K1 or K1,K2"),
    (["a.mp4 hfov=60 focal-length=26mm"], 1, "not both"),
])
def test_clip_list_mistakes_name_their_line(tmp_path, lines, number, words):
    listing = tmp_path / "list.txt"
    listing.write_text("\n".join(lines) + "\n")
    # common practice (compilers, linters): a mistake in a text file names its line, counted from 1
    with pytest.raises(UsageProblem) as caught:
        collect_jobs(str(listing), tmp_path / "out", {"readout": "10ms"})
    assert f"list.txt, line {number}:" in str(caught.value)
    assert words in str(caught.value)


def test_clip_list_mistake_is_one_line_and_exit_status_2(tmp_path, capsys):
    listing = tmp_path / "list.txt"
    listing.write_text("a.mp4\nb.mp4\n")
    code = main(["batch", str(listing), "--out", str(tmp_path / "out")])  # no readout anywhere
    err = capsys.readouterr().err.strip()
    assert code == 2  # common practice: 2 for a usage mistake (as the rest of this CLI)
    assert err.count("\n") == 0 and "line 1: no readout" in err
    assert not (tmp_path / "out").exists()  # refused before anything was made


def test_bad_sources_give_one_line_errors(rendered, tmp_path, capsys):
    cases = [
        (["batch", str(tmp_path / "missing"), "--out", str(tmp_path / "o"), "-r", "1ms"], 1, "no such folder"),
        (["batch", str(rendered / GOOD[0]), "--out", str(tmp_path / "o"), "-r", "1ms"], 1, "not a text clip list"),
        (["batch", str(rendered), "--out", str(rendered), "-r", "1ms"], 2, "is the input folder"),
        (["batch", str(rendered), "--out", str(tmp_path / "o"), "-r", "1ms", "--workers", "0"], 2, "--workers"),
        (["batch", str(rendered), "--out", str(tmp_path / "o"), "--scheduler", "nonsense", "-r", "1ms"], 2,
         "not a usable address"),
    ]
    (tmp_path / "empty").mkdir()
    cases.append((["batch", str(tmp_path / "empty"), "--out", str(tmp_path / "o"), "-r", "1ms"], 1,
                  "holds no video files"))
    for argv, status, words in cases:  # common practice: 1 for bad input, 2 for a usage mistake
        code = main(argv)
        err = capsys.readouterr().err.strip()
        assert (code, err.count("\n")) == (status, 0), (argv, err)
        assert err.startswith("skewfix: ") and words in err, (argv, err)


def test_missing_cluster_extra_is_one_line(rendered, tmp_path, monkeypatch, capsys):
    import sys

    monkeypatch.setitem(sys.modules, "distributed", None)  # as if the extra were not installed
    code = main(["batch", str(rendered), "--out", str(tmp_path / "o"), "-r", "1ms",
                 "--scheduler", "tcp://127.0.0.1:8786"])
    err = capsys.readouterr().err.strip()
    # the extra's name as declared in pyproject.toml ([project.optional-dependencies] cluster)
    assert code == 2 and err.count("\n") == 0 and "pip install 'skewfix[cluster]'" in err


def test_batch_on_a_dask_cluster_on_loopback(clips, tmp_path, capsys):
    distributed = pytest.importorskip("distributed")
    out = tmp_path / "out"
    with distributed.LocalCluster(n_workers=1, threads_per_worker=1, processes=False, host="127.0.0.1",
                                  protocol="tcp://", dashboard_address=None) as cluster:
        address = cluster.scheduler_address
        assert address.startswith("tcp://127.0.0.1:")  # loopback only (RFC 1122: 127.0.0.0/8)
        code = main(["batch", str(clips), "--out", str(out), "--readout", "10ms", "--scheduler", address])
        err = capsys.readouterr().err
        # one task per clip went through the scheduler (its per-prefix transition counts)
        assert cluster.scheduler.task_prefixes["skewfix-clip"].state_counts["memory"] == 3
    assert code == 1
    for name in GOOD:
        assert f"done  {name}" in err
        # the fixture rendered FRAMES frames of WIDTH x HEIGHT; common practice: a correction keeps both
        assert video_shape(out / name) == (FRAMES, WIDTH, HEIGHT)
    assert "failed  broken.mp4" in err


def test_lens_settings_from_the_command_line_and_the_line(tmp_path):
    listing = tmp_path / "list.txt"
    listing.write_text("a.mp4\nb.mp4 focal-length=26mm model=rotation\nc.mp4 lens-distortion=-0.1\n")
    jobs = collect_jobs(str(listing), tmp_path / "out", {"readout": "10ms", "hfov": "70", "model": "auto"})
    a, b, c = (job.settings for job in jobs)
    assert a == {"readout": "10ms", "hfov": "70", "model": "auto"}
    # one lens, given one way: the line's focal length replaces the command line's field of view
    assert b == {"readout": "10ms", "model": "rotation", "focal-length": "26mm"}
    assert c == {"readout": "10ms", "hfov": "70", "model": "auto", "lens-distortion": "-0.1"}
    with pytest.raises(UsageProblem, match="not both"):  # both on the command line: its own option names
        collect_jobs(str(listing), tmp_path / "out", {"readout": "10ms", "hfov": "70", "focal-length": "26mm"})


def test_model_and_lens_settings_reach_fix(clips, tmp_path):
    import math

    listing = tmp_path / "list.txt"
    listing.write_text(f"{clips / GOOD[0]}  wide.mp4  model=rotation  hfov=90\n"
                       f"{clips / GOOD[1]}  flat.mov  model=similarity\n")
    out = tmp_path / "out"
    wide, flat = run_batch(str(listing), str(out), {"readout": "10ms"})
    assert (wide.status, flat.status) == ("done", "done"), (wide.message, flat.message)
    # pinhole relation: a 90-degree view has f = W/2 (Hartley & Zisserman, Multiple View Geometry, sec. 6.1)
    assert f"focal length {(WIDTH / 2) / math.tan(math.radians(45)):.1f} px (given" in wide.message
    assert "motion model: 3-D rotation" in wide.message and "motion model: 2-D similarity" in flat.message
    entries = [json.loads(line) for line in (out / LEDGER_NAME).read_text().splitlines()]
    assert {"model": "rotation", "hfov": "90", "readout": "10ms"} in [e["settings"] for e in entries]


def test_fix_warnings_reach_the_log_and_outputs_the_table(clips, tmp_path, config_dir, capsys):
    """A saved camera measured in another mode than the clips' is fix's warning to check the
    readout; batch keeps it whole in its log, and its table says where each clip went."""
    cameras = config_dir / "cameras"
    cameras.mkdir(parents=True)
    # the clips are 160x90 at 25 fps (the fixture above); the camera was measured at UHD 25p
    (cameras / "deckcam-uhd25.camera").write_text(
        "skewfix camera v1\nname: deckcam-uhd25\nreadout_ms: 10.0\nline_order: top-down\n"
        "width: 3840\nheight: 2160\nframe_rate: 25/1\n", encoding="utf-8")
    (clips / "broken.mp4").unlink()
    out = tmp_path / "out"
    code = main(["batch", str(clips), "--out", str(out), "--readout", "deckcam-uhd25", "--workers", "1"])
    captured = capsys.readouterr()
    assert code == 0, captured.err
    for name in GOOD:
        block = captured.err.split(f"done  {name}:", 1)[1].split("\n   done", 1)[0]
        assert f"-> {name}" in block.splitlines()[0]
        assert "note: readout 10.000 ms" in block and "resolution differs" in block and "check the readout" in block
        row = next(line for line in captured.out.splitlines() if line.count(name) == 2)  # clip and output
        assert "done" in row
