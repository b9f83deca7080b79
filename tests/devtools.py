"""A minimal client of the Chrome DevTools Protocol over Chromium's ``--remote-debugging-pipe``.

The protocol's messages are JSON objects, each ended by a NUL byte, written to the
browser's file descriptor 3 and read from its descriptor 4 (Chromium's
``--remote-debugging-pipe`` switch); no websocket and no package beyond the standard
library. Commands go to one page through a flattened session (``Target.attachToTarget``
with ``flatten``), and events are kept so a test can look for them afterwards.
"""

from __future__ import annotations

import contextlib
import json
import os
import select
import shutil
import subprocess
import time
from pathlib import Path
from typing import Any

CHROMIUM = shutil.which("chromium") or shutil.which("chromium-browser")


class DevToolsError(RuntimeError):
    """The browser answered a command with an error, or did not answer in time."""


class Browser:
    """Headless Chromium with one page, driven over the DevTools pipe."""

    def __init__(self, profile: Path, *, width: int = 1300, height: int = 900) -> None:
        assert CHROMIUM is not None, ("the headless browser test needs chromium on the PATH: run `make test` "
                                      "(installs Debian's chromium package as root) or `apt-get install chromium`")
        to_browser_r, self._to_browser = os.pipe()
        self._from_browser, from_browser_w = os.pipe()

        def child() -> None:  # in the child before exec: the pipe ends become fds 3 and 4
            a, b = os.dup(to_browser_r), os.dup(from_browser_w)
            os.dup2(a, 3)
            os.dup2(b, 4)

        self.proc = subprocess.Popen(
            [CHROMIUM, "--headless", "--no-sandbox", "--disable-gpu", "--remote-debugging-pipe", "--no-first-run",
             "--disable-background-networking", "--disable-component-update", "--disable-sync", "--mute-audio",
             "--autoplay-policy=no-user-gesture-required", f"--user-data-dir={profile}",
             f"--window-size={width},{height}", "about:blank"],
            preexec_fn=child, pass_fds=(3, 4), stdout=subprocess.DEVNULL, stderr=subprocess.DEVNULL)
        os.close(to_browser_r)
        os.close(from_browser_w)
        self._buffer = b""
        self._next_id = 0
        self.events: list[dict[str, Any]] = []
        target = self.command("Target.createTarget", url="about:blank")["targetId"]
        self.session = self.command("Target.attachToTarget", targetId=target, flatten=True)["sessionId"]
        for domain in ("Page", "Runtime", "Network"):
            self.page(f"{domain}.enable")

    def _read_message(self, deadline: float) -> dict[str, Any]:
        while b"\0" not in self._buffer:
            left = deadline - time.monotonic()
            if left <= 0 or not select.select([self._from_browser], [], [], left)[0]:
                raise DevToolsError("no message from the browser in time")
            chunk = os.read(self._from_browser, 1 << 16)
            if not chunk:
                raise DevToolsError("the browser closed its pipe")
            self._buffer += chunk
        message, self._buffer = self._buffer.split(b"\0", 1)
        return json.loads(message)

    def command(self, method: str, *, session: str | None = None, timeout_s: float = 30.0, **params: Any) -> Any:
        """Send one command and return its result; events that arrive meanwhile are kept."""
        self._next_id += 1
        message: dict[str, Any] = {"id": self._next_id, "method": method, "params": params}
        if session:
            message["sessionId"] = session
        os.write(self._to_browser, json.dumps(message).encode() + b"\0")
        deadline = time.monotonic() + timeout_s
        while True:
            reply = self._read_message(deadline)
            if reply.get("id") != self._next_id:
                self.events.append(reply)
                continue
            if "error" in reply:
                raise DevToolsError(f"{method}: {reply['error']}")
            return reply.get("result", {})

    def page(self, method: str, **params: Any) -> Any:
        """A command to the page's session."""
        return self.command(method, session=self.session, **params)

    def evaluate(self, expression: str, *, timeout_s: float = 30.0) -> Any:
        """The value of a JavaScript expression in the page (promises awaited)."""
        result = self.command("Runtime.evaluate", session=self.session, timeout_s=timeout_s, expression=expression,
                              awaitPromise=True, returnByValue=True)
        if "exceptionDetails" in result:
            raise DevToolsError(f"page script failed: {result['exceptionDetails']}")
        return result["result"].get("value")

    def wait_for(self, expression: str, *, timeout_s: float = 30.0) -> Any:
        """Poll an expression until it is truthy; its value."""
        deadline = time.monotonic() + timeout_s
        while time.monotonic() < deadline:
            value = self.evaluate(expression)
            if value:
                return value
            time.sleep(0.1)
        raise DevToolsError(f"still false after {timeout_s} s: {expression}")

    def key(self, key: str, *, ctrl: bool = False) -> None:
        """Press and release one key, as typed on a keyboard (``text`` only for printable keys)."""
        codes = {"Enter": 13, "Escape": 27, "ArrowRight": 39, "ArrowLeft": 37, " ": 32}
        common: dict[str, Any] = {"key": key, "modifiers": 2 if ctrl else 0,
                                  "windowsVirtualKeyCode": codes.get(key, ord(key.upper()[0]))}
        text = {"text": key} if len(key) == 1 and not ctrl else {}
        self.page("Input.dispatchKeyEvent", type="keyDown", **common, **text)
        self.page("Input.dispatchKeyEvent", type="keyUp", **common)

    def type_text(self, text: str) -> None:
        """Insert text into the focused field, as an input method would."""
        self.page("Input.insertText", text=text)

    def screenshot(self, path: Path) -> None:
        import base64

        path.write_bytes(base64.b64decode(self.page("Page.captureScreenshot", format="png")["data"]))

    def close(self) -> None:
        with contextlib.suppress(DevToolsError):
            self.command("Browser.close", timeout_s=5)
        try:
            self.proc.wait(timeout=10)
        except subprocess.TimeoutExpired:
            self.proc.kill()
            self.proc.wait()
        os.close(self._to_browser)
        os.close(self._from_browser)
