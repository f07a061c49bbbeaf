"""`fix --report` (a self-contained page, checked in a real browser) and `preview`."""

from __future__ import annotations

import base64
import re
import shutil
import subprocess
from html.parser import HTMLParser

import cv2
import numpy as np
import pytest
from skimage.metrics import peak_signal_noise_ratio

from conftest import run_cli
from skewfix.cli import main

READOUT_MS = 20
FRAME = 5


run = run_cli


class ImageCollector(HTMLParser):
    """Every <img> src, and every other attribute that could fetch something."""

    def __init__(self):
        super().__init__()
        self.images, self.fetches, self.scripts = [], [], 0

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        if tag == "img":
            self.images.append(attrs.get("src", ""))
        elif tag == "script":
            self.scripts += 1
        for key in ("href", "src"):
            if tag != "img" and attrs.get(key):
                self.fetches.append(attrs[key])


@pytest.fixture(scope="module")
def whip(clip_factory):
    return clip_factory("whip", READOUT_MS / 1000, n_frames=10)


@pytest.fixture(scope="module")
def report_page(whip, tmp_path_factory):
    folder = tmp_path_factory.mktemp("report")
    page = folder / "report.html"
    code = main(["fix", str(whip[0]), str(folder / "fixed.mp4"), "--readout", f"{READOUT_MS}ms",
                 "--report", str(page), "--quiet"])
    assert code == 0
    return page


def test_report_is_one_self_contained_page(report_page):
    text = report_page.read_text(encoding="utf-8")
    parser = ImageCollector()
    parser.feed(text)
    assert len(parser.images) == 3  # motion curves, skew per frame, before/after still
    for src in parser.images:
        assert src.startswith("data:image/png;base64,")
        png = np.frombuffer(base64.b64decode(src.split(",", 1)[1]), np.uint8)
        img = cv2.imdecode(png, cv2.IMREAD_COLOR)
        assert img is not None and img.shape[0] > 100 and img.shape[1] > 200
    assert parser.fetches == [] and parser.scripts == 0 and "url(" not in text
    assert f"{READOUT_MS:.3f} ms" in text  # the readout used
    assert "given on the command line" in text  # where the readout came from
    assert "Notes and warnings" in text


# Counts the images the browser decoded and any error event, into the page title.
_PROBE = """<script>
var skewfixErrors = 0;
window.addEventListener('error', function () { skewfixErrors += 1; }, true);
window.addEventListener('load', function () {
  var all = Array.prototype.slice.call(document.images);
  var shown = all.filter(function (i) { return i.complete && i.naturalWidth > 0; }).length;
  document.title = 'probe images ' + shown + '/' + all.length + ' errors ' + skewfixErrors;
});
</script>"""


def chromium_binary():
    return shutil.which("chromium") or shutil.which("chromium-browser")


@pytest.mark.skipif(chromium_binary() is None,
                    reason="Debian's chromium is not installed (.ci/install_browser.sh installs it)")
def test_report_loads_in_headless_chromium(report_page, tmp_path):
    probed = tmp_path / "probed.html"
    probed.write_text(report_page.read_text(encoding="utf-8").replace("<head>", "<head>\n" + _PROBE, 1),
                      encoding="utf-8")
    cmd = [chromium_binary(), "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
           "--disable-background-networking", "--disable-component-update", "--disable-sync",
           f"--user-data-dir={tmp_path / 'profile'}", "--virtual-time-budget=5000", "--dump-dom",
           probed.as_uri()]
    proc = subprocess.run(cmd, capture_output=True, text=True, timeout=120)
    assert proc.returncode == 0, proc.stderr[-2000:]
    title = re.search(r"<title>(.*?)</title>", proc.stdout, re.S)
    assert title is not None, proc.stdout[:500]
    assert title.group(1).strip() == "probe images 3/3 errors 0"


def grid_mask(shape) -> np.ndarray:
    """Pixels the preview's reference lines may touch (drawn on a blank image, widened by 1 px)."""
    from skewfix.preview import draw_reference_grid

    lines = draw_reference_grid(np.zeros(shape, np.uint8)).any(axis=2).astype(np.uint8)
    return cv2.dilate(lines, np.ones((3, 3), np.uint8)) > 0


def test_preview_still_is_closer_to_the_truth_after(truth_clip, tmp_path, capsys):
    clip = truth_clip("whip", READOUT_MS / 1000, n_frames=10)  # rendered by tests/truth.py
    path, renderer = clip.path, clip.clip
    still = tmp_path / "still.png"
    # a video's frames are numbered from 1 (README: frame numbers): position FRAME is frame FRAME + 1
    code, err = run(capsys, "preview", path, "--readout", f"{READOUT_MS}ms", "--frame", FRAME + 1, "--out", still,
                    "--quiet")
    assert code == 0, err
    panel = cv2.cvtColor(cv2.imread(str(still)), cv2.COLOR_BGR2RGB)
    h, w = renderer.height, renderer.width
    assert panel.shape == (h + 36, 2 * w + 8, 3)  # label band above, 8 px gap between the halves
    before, after = panel[36:, :w], panel[36:, w + 8:]
    truth = clip.global_view(FRAME)
    keep = ~grid_mask(truth.shape)
    keep[: h // 6], keep[-h // 6:], keep[:, : w // 6], keep[:, -w // 6:] = False, False, False, False

    def score(img):  # scikit-image's PSNR over the pixels the grid leaves alone, central part
        return peak_signal_noise_ratio(truth[keep], img[keep], data_range=255)

    assert score(after) >= score(before) + 5.0
    code, err = run(capsys, "preview", path, "--readout", f"{READOUT_MS}ms", "--frame", 99, "--out",
                    tmp_path / "other.png")
    assert code == 1 and "no frame 99" in err and not (tmp_path / "other.png").exists()
    code, err = run(capsys, "preview", path, "--readout", f"{READOUT_MS}ms", "--out", still)
    assert code == 2 and "--force" in err


def test_crop_border_reports_the_skew_of_the_motion_not_of_the_enlargement(whip, tmp_path, monkeypatch):
    """With --border crop the rendered maps also enlarge the picture; the report's skew per
    frame must be the motion's alone, the same as without the crop (a crop is no skew)."""
    from skewfix.cli.deliverables import FixDeliverables

    seen = {}

    def capture(self, result, skew):
        seen[self.border] = np.array(skew)

    monkeypatch.setattr(FixDeliverables, "_write_report", capture)
    for border in ("edge", "crop"):
        code = main(["fix", str(whip[0]), str(tmp_path / f"{border}.mp4"), "--readout", f"{READOUT_MS}ms",
                     "--border", border, "--report", str(tmp_path / f"{border}.html"), "--quiet"])
        assert code == 0
    assert np.abs(seen["edge"]).max() > 1.0  # a whip pan: real skew to report
    # the crop run fits the whole clip at once and the edge run in windows, so the two fits
    # differ by a few hundredths of a pixel; an enlargement counted as skew would add pixels
    assert np.allclose(seen["crop"], seen["edge"], atol=0.25)


def test_report_still_shows_the_input_frame_it_names(clip_factory, tmp_path, monkeypatch):
    """The 'as shot' half of the still is kept from the render (not decoded again) and must be
    exactly that input frame, although the render reuses its buffers (common practice). The
    clip is long enough for the still frame's buffers to be reused before the end."""
    import skewfix.cli.deliverables as deliverables

    whip = clip_factory("whip", READOUT_MS / 1000, n_frames=100)
    shown = {}
    original = deliverables.still_png

    def capture(before, after):
        shown["before"] = before
        return original(before, after)

    monkeypatch.setattr(deliverables, "still_png", capture)
    page = tmp_path / "r.html"
    assert main(["fix", str(whip[0]), str(tmp_path / "f.mp4"), "--readout", f"{READOUT_MS}ms",
                 "--report", str(page), "--quiet"]) == 0
    k = int(re.search(r"Before and after \(frame (\d+)\)", page.read_text(encoding="utf-8")).group(1))
    frame = deliverables.decoded_frame_at(str(whip[0]), None, k - 1)  # frame numbers count from 1
    from skewfix.decode import open_source

    with open_source(str(whip[0])) as source:
        info = source.info
    assert np.array_equal(shown["before"], deliverables.planes_to_rgb(frame.planes, frame.pix_fmt, info, 8))
