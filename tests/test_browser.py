"""report.html as a person sees it: rendered by headless Chromium (Debian package).

Checks: the verdict, what stands out and the sorted estimates are in the
rendered DOM and visible on screen, the page's own script ran under its Content-Security-Policy, no
console message (errors, CSP refusals) and no request to any other host. The
request check reads Chromium's network log (``--log-net-log``) and keeps the
requests whose network isolation key is the ``file://`` page (the browser's own
background traffic has other keys); DNS is mapped to nothing
(``--host-resolver-rules``) so even a stray request cannot leave the machine.
A control page with a remote image and a console error proves that both
detectors see what they look for.

Screenshots are kept in tests/artifacts/ (git-ignored).
"""
from __future__ import annotations

import json
import shutil
import subprocess
from pathlib import Path

import pytest

from hierwork.report.publish import write_report
from test_report_fixture import HOSTILE, Page, build_run, run_root  # noqa: F401

CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")
ARTIFACTS = Path(__file__).parent / "artifacts"
# Okabe and Ito (2008) colours used by the report (hierwork/report/style.css, plotting.py).
VERMILLION, GREEN, BLUE = (0xD5, 0x5E, 0x00), (0x00, 0x9E, 0x73), (0x00, 0x72, 0xB2)

pytestmark = [pytest.mark.browser, pytest.mark.slow,  # the fixtures fit the report's run (MCMC)
              pytest.mark.skipif(CHROMIUM is None, reason="chromium is not installed "
                                 "(apt-get install chromium; CI installs it)")]


def _chromium(page: Path, tmp: Path, *extra: str) -> subprocess.CompletedProcess:
    args = [CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu",
            "--disable-background-networking", "--disable-component-update", "--disable-sync",
            "--no-first-run", "--disable-extensions", f"--user-data-dir={tmp / 'profile'}",
            "--host-resolver-rules=MAP * ~NOTFOUND", "--enable-logging=stderr", "--v=0",
            *extra, page.resolve().as_uri()]
    return subprocess.run(args, capture_output=True, text=True, timeout=120, check=True)


def _load(page: Path, tmp: Path) -> tuple[str, list[str], list[str]]:
    """Rendered DOM, console lines, and URLs the page itself requested."""
    netlog = tmp / "net.json"
    done = _chromium(page, tmp, f"--log-net-log={netlog}", "--dump-dom")
    console = [line for line in done.stderr.splitlines() if ":CONSOLE" in line]
    log = json.loads(netlog.read_text())
    start = log["constants"]["logEventTypes"]["URL_REQUEST_START_JOB"]
    requested = [e["params"]["url"] for e in log["events"]
                 if e["type"] == start and "file://" in e["params"].get("network_isolation_key", "")
                 and not e["params"]["url"].startswith(("file:", "data:"))]
    return done.stdout, console, requested


def _screenshot(page: Path, tmp: Path, name: str, width: int, height: int):
    from PIL import Image

    ARTIFACTS.mkdir(exist_ok=True)
    target = ARTIFACTS / name
    _chromium(page, tmp, f"--screenshot={target}", f"--window-size={width},{height}",
              "--hide-scrollbars")
    return Image.open(target).convert("RGB")


def _pixels_near(image, colour, box=None, tolerance=24) -> int:
    """How many pixels of ``image`` (within ``box``) are close to ``colour``."""
    region = image.crop(box) if box else image
    return sum(1 for p in region.getdata() if all(abs(a - b) <= tolerance for a, b in zip(p, colour)))


def test_detectors_see_a_remote_request_and_a_console_error(tmp_path):
    control = tmp_path / "control.html"
    control.write_text('<!DOCTYPE html><p>control</p><img src="http://example.invalid/x.png">'
                       '<script>console.error("control-error")</script>')
    _, console, requested = _load(control, tmp_path)
    assert requested == ["http://example.invalid/x.png"]
    assert any("control-error" in line for line in console)


@pytest.fixture(scope="module")
def failing_report(run_root):
    run = build_run(run_root, failing=True)
    write_report(run)
    return run / "report.html"


@pytest.fixture(scope="module")
def passing_report(run_root):
    run = build_run(run_root)
    write_report(run)
    return run / "report.html"


def test_failing_report_renders_offline_without_console_messages(failing_report, tmp_path):
    dom, console, requested = _load(failing_report, tmp_path)
    assert requested == []
    assert console == []
    page = Page(dom)
    verdict = page.find("section", id="verdict")[0][2]
    assert "Gate failed (R-hat, Bulk ESS): do not use these estimates." in verdict
    assert page.find("section", id="standout")[0][2].startswith("What stands out")
    pooling = page.find("figure", id="pooling-farm-intercept")
    assert pooling and pooling[0][2].startswith("farm, expected outcome: hollow circles")
    # The sort script ran, so the policy's script hash matched the script.
    assert all("sort-ready" in a["class"] for _, a, _ in page.find("table")
               if "sortable" in a.get("class", ""))
    # The hostile group label is text in the DOM, not an element.
    assert any(text == HOSTILE for _, _, text in page.find("td"))
    assert len(page.find("script")) == 1


def test_failing_first_screens_show_the_verdict_and_sorted_estimates(failing_report, tmp_path):
    desktop = _screenshot(failing_report, tmp_path, "report-failing-desktop.png", 1280, 2200)
    # The verdict box (vermillion border and banner) is on the first screen, near the top.
    assert _pixels_near(desktop, VERMILLION, (0, 0, 1280, 450)) > 3000
    # After what stands out, the sorted estimates' blue intervals, within the first two screens.
    assert _pixels_near(desktop, BLUE, (0, 450, 1280, 2200)) > 300
    phone = _screenshot(failing_report, tmp_path, "report-failing-phone.png", 390, 844)
    assert _pixels_near(phone, VERMILLION, (0, 0, 390, 500)) > 1500
    assert phone.size == (390, 844)


def test_passing_report_is_green_and_clean(passing_report, tmp_path):
    dom, console, requested = _load(passing_report, tmp_path)
    assert requested == [] and console == []
    assert "Gate passed" in Page(dom).find("section", id="verdict")[0][2]
    desktop = _screenshot(passing_report, tmp_path, "report-passing-desktop.png", 1280, 1100)
    assert _pixels_near(desktop, GREEN, (0, 0, 1280, 450)) > 1500
    assert _pixels_near(desktop, VERMILLION) < 50
