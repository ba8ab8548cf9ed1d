"""Static chart files (PNG, SVG, PDF) through one long-lived kaleido engine.

kaleido 1.x renders in a headless Chrome/Chromium that choreographer finds and launches (it always
passes --no-sandbox unless asked otherwise, which is what lets it run as root). Starting the browser costs
seconds, so one engine lives for the app's life on its own event-loop thread. Calls are serialised with a
lock because kaleido's shared sync server pairs answers with callers by queue order, and a concurrent
caller can walk off with someone else's image. Each call has a timeout; a timed-out engine is torn down
and started afresh on the next call.

Where the browser is looked for, in order:
1. ``HELMSHIFT_BROWSER``: ``none`` switches static export off; any other value is the browser's path.
2. ``BROWSER_PATH`` (choreographer's own override): the browser's path.
3. choreographer's search: a browser downloaded by ``kaleido_get_chrome``, then chrome/chromium/edge/brave
   names on PATH and their usual install paths (e.g. /usr/bin/chromium).

The deck and the brief that embed these files live in :mod:`app.briefing.deck` and
:mod:`app.briefing.brief`; what every export says about its sources lives in :mod:`app.analysis.provenance`.
"""

from __future__ import annotations

import asyncio
import atexit
import concurrent.futures
import os
import threading
import time
from pathlib import Path
from typing import Any, Literal

import plotly.graph_objects as go

Format = Literal["png", "svg", "pdf"]
FORMATS: tuple[Format, ...] = ("png", "svg", "pdf")

ENABLE_HINT = (
    "To enable chart, deck and brief export, install Chromium (apt-get install chromium) or set "
    "BROWSER_PATH to a Chrome or Chromium executable."
)


class ExportError(RuntimeError):
    """A static export could not be made."""


class ExportUnavailable(ExportError):
    """No usable browser: the dashboard works, but static export is off. The message says how to enable it."""


class ExportTimeout(ExportError):
    """The engine took longer than the caller's timeout."""


def find_browser() -> tuple[str | None, str]:
    """Return (browser path or None, a sentence saying what was found or how to enable export)."""
    setting = os.environ.get("HELMSHIFT_BROWSER", "").strip()
    if setting.lower() in {"none", "off", "false", "0"}:
        return None, (f"Static export is switched off (HELMSHIFT_BROWSER={setting}). Unset HELMSHIFT_BROWSER "
                      "to let Helmshift find a browser. " + ENABLE_HINT)
    origin, candidate = "HELMSHIFT_BROWSER", setting
    if not candidate and (env := os.environ.get("BROWSER_PATH", "").strip()):
        origin, candidate = "BROWSER_PATH", env
    if candidate:
        path = Path(candidate).expanduser()
        if not (path.is_file() and os.access(path, os.X_OK)):
            return None, f"{origin}={candidate} is not an executable file. " + ENABLE_HINT
        return str(path), f"Static export uses the browser at {path} (from {origin})."
    from choreographer.browsers.chromium import Chromium

    found = Chromium.find_browser(skip_local=False)
    if not found or not Path(found).is_file():
        return None, "No Chrome or Chromium browser was found on this machine. " + ENABLE_HINT
    return str(found), f"Static export uses the browser at {found}."


class _Engine:
    """One kaleido browser on a private event loop; not thread-safe on its own (callers hold _LOCK)."""

    def __init__(self, browser: str, start_timeout: float = 60.0) -> None:
        import kaleido

        self.browser = browser
        self._loop = asyncio.new_event_loop()
        self._thread = threading.Thread(target=self._loop.run_forever, name="helmshift-kaleido", daemon=True)
        self._thread.start()
        # timeout=None: the caller's future.result(timeout) is the one clock; mathjax=False keeps the
        # page offline (kaleido would otherwise fetch MathJax from a CDN).
        self._kaleido = kaleido.Kaleido(n=1, timeout=None, mathjax=False, path=browser)
        try:
            self._run(self._kaleido.open(), start_timeout)
        except BaseException:
            self.close()
            raise

    def _run(self, coro: Any, timeout: float) -> Any:
        future = asyncio.run_coroutine_threadsafe(coro, self._loop)
        try:
            return future.result(timeout)
        except concurrent.futures.TimeoutError:
            future.cancel()
            raise

    def render(self, fig: dict[str, Any], opts: dict[str, Any], timeout: float) -> bytes:
        return bytes(self._run(self._kaleido.calc_fig(fig, opts=opts), timeout))

    def close(self) -> None:
        try:
            if self._loop.is_running():
                self._run(self._kaleido.close(), 15.0)
        except Exception:  # noqa: BLE001, S110 - a browser that will not close is killed with the process group
            pass
        finally:
            self._loop.call_soon_threadsafe(self._loop.stop)
            self._thread.join(5.0)
            if not self._thread.is_alive():
                self._loop.close()


_LOCK = threading.Lock()
_engine: _Engine | None = None
#: what kaleido's JavascriptError says when its tab runs a render before its page script has loaded
_PAGE_NOT_READY = "kaleido_scopes is not defined"


def _get_engine(browser: str) -> _Engine:
    global _engine
    if _engine is not None and _engine.browser != browser:
        _engine.close()
        _engine = None
    if _engine is None:
        try:
            _engine = _Engine(browser)
        except Exception as exc:
            raise ExportUnavailable(f"The browser at {browser} could not be started ({exc}). "
                                    + ENABLE_HINT) from exc
        # registered after the engine made its temp folders, so at exit it runs before the weakref
        # finalisers that would otherwise delete those folders under a still-running browser
        atexit.unregister(shutdown_engine)
        atexit.register(shutdown_engine)
    return _engine


def shutdown_engine() -> None:
    """Close the export browser (registered to run at interpreter exit; safe to call twice)."""
    global _engine
    with _LOCK:
        if _engine is not None:
            _engine.close()
            _engine = None



def export_available() -> tuple[bool, str]:
    """Whether static export can run here, and a sentence a page can show (how to enable it if not)."""
    path, message = find_browser()
    return path is not None, message


def figure_bytes(fig: go.Figure, fmt: Format, *, width: int = 1100, height: int = 620,
                 timeout: float = 60) -> bytes:
    """Render ``fig`` as PNG (at scale 2), SVG or PDF bytes.

    Raises ExportUnavailable when no browser can be used, ExportTimeout past ``timeout`` seconds
    (waiting for the engine included), ValueError for an unknown format.
    """
    if fmt not in FORMATS:
        raise ValueError(f"format must be one of {', '.join(FORMATS)}; got {fmt!r}.")
    browser, message = find_browser()
    if browser is None:
        raise ExportUnavailable(message)
    opts = {"format": fmt, "width": width, "height": height, "scale": 2 if fmt == "png" else 1}
    started = time.monotonic()
    if not _LOCK.acquire(timeout=timeout):
        raise ExportTimeout(f"The export engine stayed busy for more than {timeout:g} s.")
    global _engine
    try:
        engine = _get_engine(browser)
        remaining = max(0.001, timeout - (time.monotonic() - started))
        try:
            try:
                return engine.render(fig.to_dict(), opts, remaining)
            except Exception as exc:
                if _PAGE_NOT_READY not in str(exc):
                    raise
                # kaleido's tab answered before its page script loaded (seen once under heavy load, in a
                # suite run): the tab is unusable, so a fresh browser renders it, once
                engine.close()
                _engine = None
                engine = _get_engine(browser)
                remaining = max(0.001, timeout - (time.monotonic() - started))
                return engine.render(fig.to_dict(), opts, remaining)
        except concurrent.futures.TimeoutError:
            # the browser may be wedged mid-render: start a fresh one next time
            engine.close()
            _engine = None
            raise ExportTimeout(f"Rendering the {fmt.upper()} took more than {timeout:g} s.") from None
    finally:
        _LOCK.release()
