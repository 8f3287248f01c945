"""Headless-Chromium check of the HTML report (the test helper tests/browser_check.py).

The tests marked ``browser`` open real pages in Chromium. Where it is missing they skip with a
one-line reason (tests/conftest.py); CI installs it and sets SPATIAL_EV_REQUIRE_BROWSER=1, which
turns that skip into a failure, because an unchecked report is exactly what they exist to
prevent. The checker's own validation, its problem list and its log filter need no browser and
run everywhere.
"""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pytest
from browser_check import BrowserCheck, find_chromium, inspect_in_browser
from report_example import example_context

from spatial_ev.errors import InputError
from spatial_ev.report.html import CONTEXT_PARTS, render_report


@pytest.fixture(scope="module")
def chromium() -> str:
    try:
        return find_chromium()
    except FileNotFoundError as exc:
        pytest.fail(f"{exc}")  # only reached when conftest did not skip: a real failure


@pytest.fixture(scope="module")
def example_check(chromium, tmp_path_factory) -> BrowserCheck:
    folder = tmp_path_factory.mktemp("report")
    page = folder / "report.html"
    page.write_text(render_report(example_context()), encoding="utf-8")
    return inspect_in_browser(page)


@pytest.mark.browser
class TestInspectInBrowser:
    def test_example_report_displays_without_errors(self, example_check):
        check = example_check
        assert check.problems() == []
        assert check.ok
        assert check.instrumented
        # partition, scalogram, Moran's I, weighting, 3 scale maps, LCBD, 2 triplots
        assert check.images_total == 10
        assert check.images_broken == ()
        assert check.page_errors == () and check.console_messages == ()
        assert check.browser_errors == ()

    def test_screenshot_is_a_full_page_and_not_blank(self, example_check):
        from PIL import Image

        shot = example_check.screenshot
        assert shot.is_file() and shot.read_bytes()[:8] == b"\x89PNG\r\n\x1a\n"
        with Image.open(shot) as image:
            pixels = np.asarray(image.convert("L"), dtype=float)
        assert pixels.shape[1] == 1280
        assert pixels.shape[0] == example_check.screenshot_shape[0] >= min(
            example_check.page_height, 16000) > 3000
        assert pixels.std() == pytest.approx(example_check.screenshot_std)
        assert pixels.std() > 10.0
        # content all the way down, not only a header: every quarter of the page varies
        for part in np.array_split(pixels, 4):
            assert part.std() > 5.0

    def test_hard_cases_display_and_are_kept_as_screenshots(self, chromium, tmp_path):
        # the figures fixed for readability, in their hard cases: nothing selected by any
        # weighting scheme, no environmental variable kept (unconstrained ordination), LCBD
        # sites significant before the Holm correction only; with SPATIAL_EV_SCREENSHOT_DIR
        # set (CI keeps it as an artifact) the screenshot is copied there for review
        import os
        import shutil

        from statsmodels.stats.multitest import multipletests

        context = example_context()
        wt = context["weighting"]["table"]
        context["weighting"] = dict(context["weighting"], table=wt.assign(
            r2_adj=np.nan, p=np.linspace(0.2, 0.9, len(wt))), chosen=None)
        tp = context["triplot"]
        context["triplot"] = dict(tp, scaling_1=dict(tp["scaling_1"], variables=None),
                                  scaling_2=dict(tp["scaling_2"], variables=None))
        sites = context["lcbd"]["sites"].copy()
        # Holm (1979, Scand. J. Stat. 6:65-70) adjustment by statsmodels
        sites["p_holm"] = multipletests(sites["p"].to_numpy(), method="holm")[1]
        context["lcbd"] = dict(context["lcbd"], sites=sites, p_corrected_column="p_holm")
        page = tmp_path / "hard_cases.html"
        page.write_text(render_report(context), encoding="utf-8")
        check = inspect_in_browser(page)
        assert check.problems() == [] and check.ok
        assert check.images_total == 10 and check.images_broken == ()
        assert check.screenshot.is_file() and check.screenshot_std > 10.0
        keep = os.environ.get("SPATIAL_EV_SCREENSHOT_DIR")
        if keep:
            Path(keep).mkdir(parents=True, exist_ok=True)
            shutil.copy2(check.screenshot, Path(keep) / "report_hard_cases.png")

    def test_broken_page_is_reported(self, chromium, tmp_path):
        page = render_report({"title": "Broken on purpose", **dict.fromkeys(CONTEXT_PARTS)})
        injected = ('<img src="data:image/png;base64,AAAA" alt="deliberately broken">'
                    '<script>console.error("deliberate console error");'
                    'undefinedFunctionCall();</script></body>')
        path = tmp_path / "broken.html"
        path.write_text(page.replace("</body>", injected), encoding="utf-8")
        check = inspect_in_browser(path, capture="page")
        assert not check.ok
        assert check.instrumented
        assert check.images_total == 1
        assert check.images_broken == ("deliberately broken",)
        assert "image failed to load: deliberately broken" in check.page_errors
        assert any("undefinedFunctionCall" in e for e in check.page_errors)
        assert any("deliberate console error" in m for m in check.console_messages)
        problems = "\n".join(check.problems())
        assert "image did not load: deliberately broken" in problems
        assert check.screenshot is None and not (tmp_path / "broken.screenshot.png").exists()

class TestValidation:
    # checked before Chromium is looked for: runs without a browser
    def test_arguments_checked(self, tmp_path):
        with pytest.raises(InputError, match="is not an existing file"):
            inspect_in_browser(tmp_path / "missing.html")
        (tmp_path / "x.html").write_text("<html></html>")
        with pytest.raises(InputError, match="`width` must be ≥ 320"):
            inspect_in_browser(tmp_path / "x.html", width=100)
        with pytest.raises(InputError, match="parameter `capture` must be one of"):
            inspect_in_browser(tmp_path / "x.html", capture="pdf")


class TestBrowserCheck:
    def test_blank_screenshot_is_a_problem(self):
        check = BrowserCheck(html_path=Path("a.html"), screenshot=Path("a.png"),
                             screenshot_shape=(900, 1280), screenshot_std=0.0, page_height=900,
                             instrumented=True, images_total=0, images_broken=(),
                             page_errors=(), console_messages=(), browser_errors=(),
                             chromium="chromium")
        assert not check.ok
        assert check.problems() == ["the screenshot is blank (grey-level spread 0.00)"]

    def test_missing_recorder_is_a_problem(self):
        check = BrowserCheck(html_path=Path("a.html"), screenshot=Path("a.png"),
                             screenshot_shape=(900, 1280), screenshot_std=40.0, page_height=0,
                             instrumented=False, images_total=0, images_broken=(),
                             page_errors=(), console_messages=(), browser_errors=(),
                             chromium="chromium")
        assert not check.ok
        assert "error recorder did not run" in check.problems()[0]


class TestFindChromium:
    def test_override_must_be_executable(self, monkeypatch, tmp_path):
        monkeypatch.setenv("SPATIAL_EV_CHROMIUM", str(tmp_path / "nothing"))
        with pytest.raises(FileNotFoundError, match="not an executable file"):
            find_chromium()

    @pytest.mark.browser
    def test_finds_installed_browser(self, chromium):
        assert Path(chromium).exists()


class TestStderrFilter:
    def test_page_lines_kept_startup_noise_ignored(self):
        from browser_check import _page_lines

        url = "file:///tmp/report.html"
        stderr = "\n".join([
            "/usr/bin/chromium: 9: [: 25275990016: unexpected operator",
            "[1:2:1202/033429.08:ERROR:dbus/bus.cc:405] Failed to connect to the bus: no socket",
            "[1:1:1202/033430.13:WARNING:media/gpu/vaapi/vaapi_wrapper.cc:1655] no devices",
            '[1:1:1202/033435.97:INFO:CONSOLE:3] "boom", source: file:///tmp/report.html (3)',
            f"[1:1:1202/033435.98:ERROR:net/loader.cc:12] net::ERR_FILE_NOT_FOUND {url}/x.png",
        ])
        console, errors = _page_lines(stderr, url)
        assert console == ['"boom", source: file:///tmp/report.html (3)']
        assert len(errors) == 1 and "net::ERR_FILE_NOT_FOUND" in errors[0]
