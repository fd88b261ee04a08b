"""The status page in a real browser: headless Chromium against a running `inrush serve`."""

from __future__ import annotations

import secrets
import shutil
import subprocess
from collections.abc import Iterator
from pathlib import Path

import httpx
import numpy as np
import pytest
from apihelpers import EXPERIMENT, demo_csv_text
from inrush_process import inrush_serve
from matplotlib import image

CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")
pytestmark = [
    pytest.mark.slow,
    pytest.mark.skipif(CHROMIUM is None, reason="chromium is not installed (Debian: apt-get "
                                                "install chromium); the page is still checked "
                                                "without a browser in test_status_page.py"),
]


@pytest.fixture
def server(tmp_path: Path) -> Iterator[tuple[str, str]]:
    with inrush_serve(tmp_path) as (base, token):
        auth = {"Authorization": f"Bearer {token}"}
        assert httpx.post(f"{base}/v1/experiments", json=EXPERIMENT, headers=auth,
                          timeout=30).status_code == 201
        upload = httpx.put(f"{base}/v1/experiments/route-cards/observations",
                           content=demo_csv_text().encode(), timeout=60,
                           headers={**auth, "Content-Type": "text/csv"})
        assert upload.status_code == 200, upload.text
        yield base, token


def chromium(tmp_path: Path, *arguments: str) -> subprocess.CompletedProcess[str]:
    profile = tmp_path / f"profile-{secrets.token_hex(4)}"
    command = [str(CHROMIUM), "--headless", "--no-sandbox", "--disable-gpu", "--disable-quic",
               "--no-first-run", "--disable-background-networking",
               "--disable-component-update", "--disable-sync", f"--user-data-dir={profile}",
               *arguments]
    return subprocess.run(command, capture_output=True, text=True, timeout=120, check=False)


def test_page_renders_in_chromium(server: tuple[str, str], tmp_path: Path) -> None:
    base, token = server
    # ?token= answers with a cookie and a redirect; the browser follows both.
    url = f"{base}/experiments/route-cards?token={token}"
    dom = chromium(tmp_path, "--dump-dom", url)
    assert dom.returncode == 0, dom.stderr[-2000:]
    for text in ("Route cards on the trail list", "Arm shares against the plan",
                 "Entrants per source and arm", "naive and re-weighted"):
        assert text in dom.stdout

    shot = tmp_path / "status.png"
    done = chromium(tmp_path, f"--screenshot={shot}", "--window-size=1280,2000", url)
    assert done.returncode == 0 and shot.exists(), done.stderr[-2000:]
    pixels = image.imread(shot)[:, :, :3]
    assert pixels.shape[0] >= 1000 and pixels.shape[1] >= 1000
    colours, counts = np.unique((pixels * 255).round().astype(np.uint8).reshape(-1, 3),
                                axis=0, return_counts=True)
    # Charts, text and the header band: many colours, none covering almost everything.
    assert len(colours) > 200
    assert counts.max() / counts.sum() < 0.8
    # The header band is Inrush's deep teal (#143F3C).
    band = (pixels[5:40, :, :] * 255).round()
    assert (np.abs(band - np.array([0x14, 0x3F, 0x3C])).sum(axis=2) < 6).mean() > 0.5
