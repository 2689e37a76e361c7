"""Helpers for headless-browser tests of the offline HTML maps.

The browser is Debian's ``/usr/bin/chromium`` driven through the ``playwright`` Python package;
playwright never downloads a browser here. Every request whose URL is not ``file:``, ``data:``
or ``blob:`` is aborted and recorded, so a page that tries to reach the network fails its test.

Skipping policy: when chromium (or playwright) is absent, browser tests are *skipped* on a
developer machine but *fail* when the environment variable ``CI`` is set to a true value.

Typical use in a test module::

    @pytest.fixture(scope="module")
    def browser():
        require_browser()
        with launch_browser() as b:
            yield b

    def test_page(browser, tmp_path):
        with open_local_html(browser, path) as (page, rec):
            ...
        rec.assert_clean()
"""

from __future__ import annotations

import os
from collections.abc import Iterator
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any

import pytest

__all__ = [
    "CHROMIUM_ARGS",
    "CHROMIUM_PATH",
    "PageRecord",
    "chromium_path",
    "in_ci",
    "launch_browser",
    "open_local_html",
    "require_browser",
    "save_screenshot",
]

CHROMIUM_PATH = "/usr/bin/chromium"
CHROMIUM_ARGS = (
    "--no-sandbox",
    "--disable-gpu",
    "--disable-background-networking",
    "--disable-component-update",
    "--disable-sync",
    "--no-first-run",
    "--disable-quic",
)
_LOCAL_SCHEMES = ("file:", "data:", "blob:")


def in_ci() -> bool:
    """True when the ``CI`` environment variable is set to anything but ''/0/false/no."""
    return os.environ.get("CI", "").strip().lower() not in ("", "0", "false", "no")


def chromium_path() -> str | None:
    """``/usr/bin/chromium`` if it exists and is executable, else None."""
    p = Path(CHROMIUM_PATH)
    return str(p) if p.is_file() and os.access(p, os.X_OK) else None


def require_browser() -> str:
    """Return the chromium path, or skip (developer machine) / fail (CI) with a clear reason."""
    reasons = []
    path = chromium_path()
    if path is None:
        reasons.append(f"chromium not found at {CHROMIUM_PATH} (apt-get install chromium)")
    try:
        import playwright.sync_api  # noqa: F401
    except ImportError:
        reasons.append("Python package 'playwright' not installed (test extra)")
    if reasons:
        msg = "; ".join(reasons)
        if in_ci():
            pytest.fail(f"browser test cannot run under CI: {msg}", pytrace=False)
        pytest.skip(f"browser test skipped: {msg}")
    assert path is not None
    return path


@dataclass
class PageRecord:
    """What happened while a page was open."""

    console_errors: list[str] = field(default_factory=list)
    page_errors: list[str] = field(default_factory=list)
    dialogs: list[str] = field(default_factory=list)
    blocked_requests: list[str] = field(default_factory=list)
    requests: list[str] = field(default_factory=list)

    def problems(self) -> list[str]:
        """Every recorded console error, page error, dialog and network attempt."""
        return (
            [f"console error: {m}" for m in self.console_errors]
            + [f"page error: {m}" for m in self.page_errors]
            + [f"dialog: {m}" for m in self.dialogs]
            + [f"network request attempted: {u}" for u in self.blocked_requests]
        )

    def assert_clean(self) -> None:
        """Fail if anything in :meth:`problems` was recorded."""
        problems = self.problems()
        assert not problems, "browser recorded problems:\n" + "\n".join(problems)


@contextmanager
def launch_browser(executable_path: str | None = None) -> Iterator[Any]:
    """Launch headless chromium (never downloaded) and yield a playwright ``Browser``."""
    from playwright.sync_api import sync_playwright

    exe = executable_path or chromium_path() or CHROMIUM_PATH
    with sync_playwright() as p:
        browser = p.chromium.launch(executable_path=exe, headless=True, args=list(CHROMIUM_ARGS))
        try:
            yield browser
        finally:
            browser.close()


def _is_local(url: str) -> bool:
    return url.startswith(_LOCAL_SCHEMES)


@contextmanager
def open_local_html(
    browser: Any,
    path: str | os.PathLike[str],
    *,
    viewport: tuple[int, int] = (1280, 800),
    wait_for: str | None = "window.altigrade && window.altigrade.ready === true",
    timeout_ms: float = 15_000,
) -> Iterator[tuple[Any, PageRecord]]:
    """Open a local HTML file with networking cut off; yield ``(page, record)``.

    Parameters
    ----------
    browser : playwright Browser
        From :func:`launch_browser`.
    path : path-like
        The HTML file.
    viewport : (int, int)
        Viewport width and height [px].
    wait_for : str or None
        JavaScript expression awaited after load (None: only wait for the load event).
    timeout_ms : float
        Time limit [ms] for loading and waiting.

    Notes
    -----
    A context route aborts and records every request that is not ``file:``, ``data:`` or
    ``blob:``; console messages of type ``error``, uncaught page errors and dialogs (which are
    dismissed) are recorded too. Check them with :meth:`PageRecord.assert_clean`.
    """
    rec = PageRecord()
    context = browser.new_context(
        viewport={"width": viewport[0], "height": viewport[1]},
        service_workers="block",
        java_script_enabled=True,
    )

    def route(r: Any) -> None:
        url = r.request.url
        if _is_local(url):
            r.continue_()
        else:
            rec.blocked_requests.append(url)
            r.abort()

    context.route("**/*", route)
    context.on("request", lambda req: rec.requests.append(req.url))
    page = context.new_page()
    page.on(
        "console", lambda msg: rec.console_errors.append(msg.text) if msg.type == "error" else None
    )
    page.on("pageerror", lambda err: rec.page_errors.append(str(err)))

    def on_dialog(dialog: Any) -> None:
        rec.dialogs.append(f"{dialog.type}: {dialog.message}")
        dialog.dismiss()

    page.on("dialog", on_dialog)
    try:
        page.goto(Path(path).resolve().as_uri(), wait_until="load", timeout=timeout_ms)
        if wait_for:
            page.wait_for_function(wait_for, timeout=timeout_ms)
        yield page, rec
    finally:
        # Non-local requests that bypassed the route (none expected) still count.
        rec.blocked_requests.extend(
            u for u in rec.requests if not _is_local(u) and u not in rec.blocked_requests
        )
        context.close()


def save_screenshot(page: Any, path: str | os.PathLike[str], *, full_page: bool = False) -> Path:
    """Save a PNG screenshot of ``page`` to ``path`` (parents created); return the path."""
    out = Path(path)
    out.parent.mkdir(parents=True, exist_ok=True)
    page.screenshot(path=str(out), full_page=full_page)
    return out
