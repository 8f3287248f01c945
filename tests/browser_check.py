"""Open a report in headless Chromium and check that it really displays (a test helper).

:func:`inspect_in_browser` runs Debian's Chromium twice on an HTML file (once with
``capture="page"``), each time with a fresh, throw-away profile and no network services:

1. ``--dump-dom`` after the page's scripts ran (``--virtual-time-budget``), with Chromium's
   log on standard error (``--enable-logging=stderr --v=0``). The report page records script
   errors and image-load failures in attributes of ``<html>`` (``data-report-errors``,
   ``data-report-images``, ``data-report-height``, ``data-report-loaded``); these are read
   back from the dumped DOM. Console messages written by the page appear on standard error as
   ``...:INFO:CONSOLE...] "message", source: file://...`` lines and are collected too; the
   report never writes to the console, so any such line is a problem.
2. ``--screenshot`` with the window as tall as the page, giving a full-page PNG.

Chromium's own start-up noise on standard error is ignored: D-Bus connection failures (no
system bus in containers), GPU / VA-API / sandbox warnings, Bluetooth and power-manager
messages, and the Debian launcher script's shell warning. Only ``:ERROR:`` lines that name
the page (its ``file://`` URL), a network error (``net::ERR_``) or an uncaught exception are
kept as browser errors.

Chromium is looked up in ``$SPATIAL_EV_CHROMIUM``, then ``chromium`` and ``chromium-browser``
on ``PATH``, then ``/usr/bin/chromium``. On Debian: ``apt-get install chromium``.
"""

from __future__ import annotations

import json
import os
import re
import shutil
import signal
import subprocess
import tempfile
from dataclasses import dataclass
from html.parser import HTMLParser
from pathlib import Path

import numpy as np

from spatial_ev._validation import check_option
from spatial_ev.errors import InputError

__all__ = ["BrowserCheck", "find_chromium", "inspect_in_browser"]

_FLAGS = ("--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run",
          "--disable-background-networking", "--disable-component-update", "--disable-sync",
          "--hide-scrollbars", "--mute-audio")
_CONSOLE = re.compile(r":CONSOLE[^\]]*\]\s*(.*)$")


@dataclass(frozen=True)
class BrowserCheck:
    """What headless Chromium saw when it opened a report.

    Attributes
    ----------
    html_path : the page inspected.
    screenshot : full-page PNG written by Chromium (None with ``capture="page"``).
    screenshot_shape : (height, width) of the screenshot in pixels ((0, 0) without one).
    screenshot_std : standard deviation of the screenshot's grey levels (0 = blank page;
        None without a screenshot).
    page_height : document height in CSS pixels reported by the page (0 if unknown).
    instrumented : True if the page's recorder script ran (``data-report-loaded`` set).
    images_total : number of ``<img>`` elements in the page.
    images_broken : alt texts of images that did not load (``naturalWidth == 0``).
    page_errors : script errors and image failures recorded by the page itself.
    console_messages : messages the page wrote to the browser console.
    browser_errors : Chromium ``:ERROR:`` lines that concern the page.
    chromium : path of the Chromium executable used.
    """

    html_path: Path
    screenshot: Path | None
    screenshot_shape: tuple[int, int]
    screenshot_std: float | None
    page_height: int
    instrumented: bool
    images_total: int
    images_broken: tuple[str, ...]
    page_errors: tuple[str, ...]
    console_messages: tuple[str, ...]
    browser_errors: tuple[str, ...]
    chromium: str

    def problems(self) -> list[str]:
        """Everything that went wrong, one sentence each (empty when the page is fine)."""
        out = []
        if not self.instrumented:
            out.append("the page's error recorder did not run (no data-report-loaded "
                       "attribute): scripts failed or the page is not a spatial_ev report")
        out += [f"image did not load: {alt}" for alt in self.images_broken]
        out += [f"page error: {e}" for e in self.page_errors]
        out += [f"console message: {m}" for m in self.console_messages]
        out += [f"browser error: {e}" for e in self.browser_errors]
        if self.screenshot_std is not None and self.screenshot_std < 1.0:
            out.append(f"the screenshot is blank (grey-level spread {self.screenshot_std:.2f})")
        return out

    @property
    def ok(self) -> bool:
        """True when no problem was found."""
        return not self.problems()


def find_chromium() -> str:
    """Path of a Chromium executable, or FileNotFoundError saying how to install one.

    Examples
    --------
    >>> isinstance(find_chromium(), str)  # doctest: +SKIP
    True
    """
    override = os.environ.get("SPATIAL_EV_CHROMIUM")
    if override:
        if not (os.path.isfile(override) and os.access(override, os.X_OK)):
            raise FileNotFoundError(f"$SPATIAL_EV_CHROMIUM points to {override!r}, which is "
                                    "not an executable file")
        return override
    for name in ("chromium", "chromium-browser"):
        found = shutil.which(name)
        if found:
            return found
    if os.access("/usr/bin/chromium", os.X_OK):
        return "/usr/bin/chromium"
    raise FileNotFoundError("headless Chromium not found ($SPATIAL_EV_CHROMIUM, chromium, "
                            "chromium-browser, /usr/bin/chromium; `apt-get install chromium`)")


class _RootAttributes(HTMLParser):
    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.attrs: dict[str, str] | None = None

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        if tag == "html" and self.attrs is None:
            self.attrs = {k: v or "" for k, v in attrs}


def _run(chromium: str, args: list[str], url: str, timeout: float) -> tuple[str, str]:
    profile = tempfile.mkdtemp(prefix="spatial_ev-chromium-")
    cmd = [chromium, *_FLAGS, f"--user-data-dir={profile}", *args, url]
    try:
        proc = subprocess.Popen(cmd, stdout=subprocess.PIPE, stderr=subprocess.PIPE,
                                text=True, errors="replace", start_new_session=True)
        try:
            out, err = proc.communicate(timeout=timeout)
        except subprocess.TimeoutExpired:
            os.killpg(proc.pid, signal.SIGKILL)  # the group we started, nothing else
            proc.communicate()
            raise RuntimeError(f"Chromium did not finish within {timeout:g} s on {url}") from None
        if proc.returncode != 0:
            tail = "\n".join(err.strip().splitlines()[-5:])
            raise RuntimeError(f"Chromium exited with status {proc.returncode} on {url}: {tail}")
        return out, err
    finally:
        shutil.rmtree(profile, ignore_errors=True)


def _page_lines(stderr: str, url: str) -> tuple[list[str], list[str]]:
    console, errors = [], []
    for line in stderr.splitlines():
        match = _CONSOLE.search(line)
        if match:
            console.append(match.group(1).strip())
        elif ":ERROR:" in line and (url in line or "net::ERR_" in line or "Uncaught" in line):
            errors.append(line.strip())
    return console, errors


def _json_attr(attrs: dict[str, str], name: str, default: object) -> object:
    try:
        return json.loads(attrs[name])
    except (KeyError, ValueError):
        return default


def inspect_in_browser(html_path: str | os.PathLike, *,
                       screenshot: str | os.PathLike | None = None, capture: str = "full",
                       width: int = 1280,
                       time_budget_ms: int = 5000, max_height: int = 16000,
                       timeout: float = 60.0) -> BrowserCheck:
    """Open ``html_path`` in headless Chromium; return what loaded, what failed, a screenshot.

    Parameters
    ----------
    html_path : an HTML file (usually a rendered spatial_ev report).
    screenshot : where to write the full-page PNG (default: ``<html stem>.screenshot.png``
        beside the page).
    capture : ``"full"`` (page state and screenshot) or ``"page"`` (page state only: one
        Chromium run instead of two; the screenshot fields are then empty and not checked).
    width : window width in CSS pixels.
    time_budget_ms : virtual time given to the page's scripts before the DOM is read.
    max_height : cap on the screenshot height in pixels (longer pages are cut; the window is
        as tall as the page, which costs time and memory on very long pages).
    timeout : seconds each Chromium run may take.

    Returns
    -------
    BrowserCheck; ``check.ok`` is True and ``check.problems()`` empty when the page is fine.

    Examples
    --------
    >>> check = inspect_in_browser("report.html")  # doctest: +SKIP
    >>> check.ok, check.images_total  # doctest: +SKIP
    (True, 10)
    """
    path = Path(html_path).resolve()
    if not path.is_file():
        raise InputError(f"`html_path` {str(html_path)!r} is not an existing file")
    if width < 320 or max_height < 200:
        raise InputError(f"`width` must be ≥ 320 and `max_height` ≥ 200 pixels; got {width} "
                         f"and {max_height}")
    shot = (Path(screenshot) if screenshot is not None
            else path.with_name(f"{path.stem}.screenshot.png")).resolve()
    check_option("capture", capture, ("full", "page"))
    chromium = find_chromium()
    url = path.as_uri()

    dom, stderr = _run(chromium, ["--enable-logging=stderr", "--v=0",
                                  f"--window-size={width},900",
                                  f"--virtual-time-budget={time_budget_ms}", "--dump-dom"],
                       url, timeout)
    parser = _RootAttributes()
    parser.feed(dom)
    attrs = parser.attrs or {}
    images = _json_attr(attrs, "data-report-images", {})
    errors = _json_attr(attrs, "data-report-errors", [])
    try:
        height = int(attrs.get("data-report-height", "0"))
    except ValueError:
        height = 0
    console, browser_errors = _page_lines(stderr, url)

    common = dict(html_path=path, page_height=height,
                  instrumented=attrs.get("data-report-loaded") == "1",
                  images_total=int(images.get("total", 0)) if isinstance(images, dict) else 0,
                  images_broken=tuple(map(str, images.get("broken", ())))
                  if isinstance(images, dict) else (),
                  page_errors=tuple(map(str, errors)) if isinstance(errors, list)
                  else (str(errors),),
                  console_messages=tuple(console), browser_errors=tuple(browser_errors),
                  chromium=chromium)
    if capture == "page":
        return BrowserCheck(screenshot=None, screenshot_shape=(0, 0), screenshot_std=None,
                            **common)
    shot_height = min(max(height, 200), max_height) if height > 0 else min(900, max_height)
    _run(chromium, [f"--window-size={width},{shot_height}",
                    f"--virtual-time-budget={time_budget_ms}", f"--screenshot={shot}"],
         url, timeout)
    if not shot.is_file():
        raise RuntimeError(f"Chromium did not write the screenshot {str(shot)!r}")
    from PIL import Image  # Pillow ships with matplotlib

    with Image.open(shot) as image:
        grey = np.asarray(image.convert("L"), dtype=np.float64)
    return BrowserCheck(screenshot=shot, screenshot_shape=(grey.shape[0], grey.shape[1]),
                        screenshot_std=float(grey.std()), **common)
