"""``labrun report`` and the demo's report: one self-contained HTML page, rendered by headless
Chromium (Debian's ``chromium`` package; .ci/run installs it): no console or resource errors,
every image decoded, and a screenshot that is not blank. Without Chromium the rendering test is
skipped, except under CI=true, where it fails."""

from __future__ import annotations

import json
import os
import re
import shutil
import subprocess
from pathlib import Path

import numpy as np
import pytest

from labrun.cli import main

PROBE = """<script>
window.__errs = [];
addEventListener('error', e => window.__errs.push(String(e.message || e.target.src || e.type)),
                 true);
const ce = console.error.bind(console);
console.error = (...a) => { window.__errs.push(a.join(' ')); ce(...a); };
addEventListener('load', () => {
  const imgs = [...document.images];
  document.body.dataset.images = imgs.length;
  document.body.dataset.decoded = imgs.filter(i => i.complete && i.naturalWidth > 0).length;
  document.body.dataset.errors = JSON.stringify(window.__errs);
});
</script>"""


def _chromium() -> str:
    for name in ("chromium", "chromium-browser"):
        path = shutil.which(name)
        if path:
            return path
    if os.environ.get("CI", "").lower() == "true":
        pytest.fail("chromium is not installed: .ci/run must install it", pytrace=False)
    pytest.skip("no chromium (apt-get install chromium)")


def _render(page: Path, tmp: Path) -> tuple[str, Path, str]:
    """(DOM after load, screenshot path, stderr) of ``page`` in headless Chromium."""
    exe = _chromium()
    common = [exe, "--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
              "--no-first-run", "--enable-logging=stderr", "--v=0",
              f"--user-data-dir={tmp / 'profile'}", "--window-size=1200,1600"]
    dom = subprocess.run([*common, "--dump-dom", page.as_uri()], capture_output=True, text=True,
                         timeout=120, check=True)
    shot = tmp / "shot.png"
    subprocess.run([*common, f"--screenshot={shot}", page.as_uri()], capture_output=True,
                   text=True, timeout=120, check=True)
    return dom.stdout, shot, dom.stderr


@pytest.fixture(scope="module")
def demo(tmp_path_factory) -> tuple[Path, dict]:
    """One ``labrun demo`` run for the module: (its folder, its --json report)."""
    import contextlib
    import io

    folder = tmp_path_factory.mktemp("demo")
    buf = io.StringIO()
    with contextlib.redirect_stdout(buf):
        assert main(["demo", "--out", str(folder / "out"), "--db", str(folder / "demo.db"),
                     "--json", "--no-progress"]) == 0
    return folder, json.loads(buf.getvalue())


def test_demo_report_renders_in_chromium(demo, tmp_path: Path) -> None:
    folder, rep = demo
    out = folder / "out"
    page = Path(rep["report"])
    assert page == (out / "report.html").resolve() and page.is_file()
    text = page.read_text(encoding="utf-8")
    # self-contained: every image is a data: URI, nothing is fetched from elsewhere
    srcs = re.findall(r'<img[^>]*src="([^"]+)"', text)
    assert len(srcs) >= 4 and all(s.startswith("data:image/png;base64,") for s in srcs)
    assert not re.search(r'(src|href)="(https?:|file:|//)', text)
    for heading in ("Summary", "Spectra", "Sideband power against launched power",
                    "Events and faults", "Fits"):
        assert f"<h2>{heading}" in text
    assert "gamma_bessel" in text
    probed = tmp_path / "probed.html"
    probed.write_text(text.replace("<head>", "<head>" + PROBE, 1), encoding="utf-8")
    dom, shot, stderr = _render(probed, tmp_path)
    images = int(re.search(r'data-images="(\d+)"', dom).group(1))
    decoded = int(re.search(r'data-decoded="(\d+)"', dom).group(1))
    errors = json.loads(re.search(r'data-errors="([^"]*)"', dom).group(1).replace("&quot;", '"'))
    assert images == len(srcs) and decoded == images, (images, decoded)
    assert errors == []
    assert "Uncaught" not in stderr
    # not blank: a fair share of the screenshot differs from the white page (matplotlib reads
    # PNG itself)
    import matplotlib.image

    pixels = matplotlib.image.imread(shot)[..., :3]
    assert pixels.shape[0] >= 1000 and pixels.shape[1] >= 1000
    ink = np.mean(np.any(pixels < 0.9, axis=-1))
    assert ink > 0.02, ink
    assert float(pixels.std()) > 0.05


def test_report_commands(demo, tmp_path: Path, capsys) -> None:
    db = str(demo[0] / "demo.db")
    page = tmp_path / "run.html"
    assert main(["report", "1", "--db", db, "--out", str(page)]) == 0
    assert f"wrote {page}" in capsys.readouterr().out
    assert "<h2>Spectra" in page.read_text(encoding="utf-8")
    assert main(["fit", "1", "--db", db]) == 0
    spool_page = tmp_path / "spool.html"
    assert main(["report", "--spool", "HNLF-A17", "--db", db, "--out", str(spool_page)]) == 0
    text = spool_page.read_text(encoding="utf-8")
    assert "Fits over time" in text and "data:image/png;base64," in text
    capsys.readouterr()
    for argv, word in ((["report", "--db", db], "RUN_ID"),
                       (["report", "9", "--db", db], f"{db}: RUN_ID: no run 9"),
                       (["report", "--spool", "NOPE", "--db", db], "NOPE"),
                       (["report", "1", "--db", db, "--out", str(tmp_path / "x" / "r.html")],
                        "--out")):
        assert main(argv) == 2
        err = capsys.readouterr().err.strip().splitlines()
        assert len(err) == 1 and word in err[0], err
