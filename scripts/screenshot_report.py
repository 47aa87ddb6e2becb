"""Render a treeprobe HTML report in headless Chromium: a PNG screenshot, the rendered DOM, console errors.

Usage::

    python scripts/screenshot_report.py report.html -o report.png [--width 1280] [--height 4000] [--skip 0]

``--skip PX`` leaves out the first PX pixels of the page (the browser renders
PX + height pixels and the top is cut off, with matplotlib), so a screenshot can
show a part further down, such as the figures.

Needs a Chromium binary (Debian package ``chromium``). The browser runs with a
throw-away profile, no sandbox (for containers run as root), no GPU, and with
every host name resolving to nothing, so a page that tried to reach the
network would fail rather than leak a request. The functions here are also
used by ``tests/test_reporting.py``.
"""

from __future__ import annotations

import argparse
import shutil
import subprocess
import sys
import tempfile
from pathlib import Path

__all__ = ["find_chromium", "chromium_flags", "screenshot", "dump_dom", "console_errors", "cut_top"]

_BROWSERS = ("chromium", "chromium-browser")


def find_chromium() -> str | None:
    """Path of a Chromium binary on ``PATH``, or None."""
    for name in _BROWSERS:
        found = shutil.which(name)
        if found:
            return found
    return None


def chromium_flags(profile: Path) -> list[str]:
    """Flags for a quiet, offline, headless run with its own profile folder."""
    return [
        "--headless",
        "--no-sandbox",
        "--disable-gpu",
        "--disable-quic",
        "--no-first-run",
        "--disable-background-networking",
        "--disable-component-update",
        "--disable-sync",
        "--hide-scrollbars",
        "--host-resolver-rules=MAP * ~NOTFOUND",
        "--enable-logging=stderr",
        "--v=0",
        f"--user-data-dir={profile}",
    ]


def _run(html_file: Path, extra: list[str], timeout: float) -> subprocess.CompletedProcess:
    browser = find_chromium()
    if browser is None:
        raise FileNotFoundError("no chromium binary on PATH (install the Debian package 'chromium')")
    with tempfile.TemporaryDirectory(prefix="treeprobe-chromium-") as profile:
        command = [browser, *chromium_flags(Path(profile)), *extra, Path(html_file).resolve().as_uri()]
        return subprocess.run(command, capture_output=True, text=True, timeout=timeout, check=False)


def console_errors(stderr: str) -> list[str]:
    """Lines of Chromium's log that report a JavaScript error or a console error of the page."""
    return [line for line in stderr.splitlines() if "Uncaught" in line or ":ERROR:CONSOLE" in line]


def screenshot(html_file: str | Path, png_file: str | Path, *, width: int = 1280, height: int = 4000,
               timeout: float = 120.0) -> list[str]:
    """Save a ``width`` x ``height`` screenshot of the page; return the console error lines."""
    done = _run(Path(html_file), [f"--window-size={width},{height}", f"--screenshot={Path(png_file).resolve()}"],
                timeout)
    if not Path(png_file).is_file():
        raise RuntimeError(f"chromium wrote no screenshot (exit code {done.returncode}):\n{done.stderr[-2000:]}")
    return console_errors(done.stderr)


def cut_top(png_file: str | Path, skip: int) -> None:
    """Cut the first ``skip`` pixel rows off a PNG file, in place."""
    from matplotlib.image import imread, imsave

    pixels = imread(png_file)
    if not 0 <= skip < pixels.shape[0]:
        raise ValueError(f"skip={skip} is outside the image's {pixels.shape[0]} rows")
    imsave(png_file, pixels[skip:])


def dump_dom(html_file: str | Path, *, timeout: float = 120.0) -> tuple[str, list[str]]:
    """The DOM after loading the page, serialised, and the console error lines."""
    done = _run(Path(html_file), ["--dump-dom"], timeout)
    if done.returncode != 0 or not done.stdout.strip():
        raise RuntimeError(f"chromium could not render {html_file} (exit code {done.returncode}):\n{done.stderr[-2000:]}")
    return done.stdout, console_errors(done.stderr)


def main(argv: list[str] | None = None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("html", type=Path, help="the HTML report to render")
    parser.add_argument("-o", "--output", type=Path, help="PNG file to write (default: next to the HTML)")
    parser.add_argument("--width", type=int, default=1280)
    parser.add_argument("--height", type=int, default=4000)
    parser.add_argument("--skip", type=int, default=0, metavar="PX", help="leave out the first PX pixels of the page")
    args = parser.parse_args(argv)
    if not args.html.is_file():
        parser.error(f"{args.html} is not a file")
    if args.skip < 0:
        parser.error(f"--skip must be >= 0, got {args.skip}")
    output = args.output or args.html.with_suffix(".png")
    try:
        errors = screenshot(args.html, output, width=args.width, height=args.height + args.skip)
        if args.skip:
            cut_top(output, args.skip)
    except (FileNotFoundError, RuntimeError, subprocess.TimeoutExpired) as exc:
        print(f"screenshot failed: {exc}", file=sys.stderr)
        return 1
    for line in errors:
        print(f"console error: {line}", file=sys.stderr)
    print(f"wrote {output} ({output.stat().st_size:,} bytes)")
    return 1 if errors else 0


if __name__ == "__main__":
    sys.exit(main())
