"""Open an HTML page in Qt's Chromium-based browser engine, offscreen, and report what it saw.

Run as a script (the tests start it in a child process, so the engine never shares the suite's
QApplication):

    python tests/browser_check.py PAGE.html [--screenshot OUT.png] [--width 1000] [--height 1400]

Prints one JSON object: whether the page loaded, every console message at warning level or
above, every request the page made (each one is recorded by an interceptor and everything but
the page itself and data: URLs is blocked), each <img> with its natural size, every src/href
attribute, the number of <script> elements and the rendered text. ``--height 0`` grabs the whole
page. Exit status 3 means the engine could not be imported.
"""

from __future__ import annotations

import argparse
import json
import os
import sys


def _flags() -> None:
    # Must be set before the engine starts: no sandbox as root or in a container, no GPU offscreen.
    flags = os.environ.get("QTWEBENGINE_CHROMIUM_FLAGS", "").split()
    for f in ("--no-sandbox", "--disable-gpu"):
        if f not in flags:
            flags.append(f)
    os.environ["QTWEBENGINE_CHROMIUM_FLAGS"] = " ".join(flags)
    os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")
    os.environ.setdefault("QTWEBENGINE_DISABLE_SANDBOX", "1")


PROBE = """JSON.stringify({
  images: Array.from(document.images).map(i => ({alt: i.alt, complete: i.complete, naturalWidth: i.naturalWidth,
                                                  naturalHeight: i.naturalHeight, scheme: i.src.split(':')[0]})),
  attrs: Array.from(document.querySelectorAll('[src],[href]')).map(e => e.getAttribute('src') || e.getAttribute('href')),
  scripts: document.querySelectorAll('script').length,
  height: document.documentElement.scrollHeight
})"""


def main() -> int:
    ap = argparse.ArgumentParser()
    ap.add_argument("page")
    ap.add_argument("--screenshot")
    ap.add_argument("--width", type=int, default=1000)
    ap.add_argument("--height", type=int, default=1400)
    ap.add_argument("--timeout", type=float, default=30.0)
    args = ap.parse_args()
    _flags()
    try:
        from PySide6.QtCore import QTimer, QUrl
        from PySide6.QtGui import QImage, QPainter
        from PySide6.QtWebEngineCore import (
            QWebEnginePage,
            QWebEngineProfile,
            QWebEngineScript,
            QWebEngineSettings,
            QWebEngineUrlRequestInterceptor,
        )
        from PySide6.QtWebEngineWidgets import QWebEngineView
        from PySide6.QtWidgets import QApplication
    except ImportError as exc:
        print(json.dumps({"engine": f"cannot import QtWebEngine: {exc}"}))
        return 3

    page_url = QUrl.fromLocalFile(os.path.abspath(args.page))
    result: dict = {"engine": "QtWebEngine", "loaded": None, "console": [], "requests": [], "blocked": []}

    class Interceptor(QWebEngineUrlRequestInterceptor):
        def interceptRequest(self, info):  # noqa: N802 (Qt's name)
            url = info.requestUrl()
            result["requests"].append(url.toString()[:200])
            if url != page_url and url.scheme() != "data":
                result["blocked"].append(url.toString()[:200])
                info.block(True)

    class Page(QWebEnginePage):
        def javaScriptConsoleMessage(self, level, message, line, source):  # noqa: N802 (Qt's name)
            if level != QWebEnginePage.JavaScriptConsoleMessageLevel.InfoMessageLevel:
                result["console"].append({"level": level.name, "message": message, "line": line})

    app = QApplication.instance() or QApplication(sys.argv[:1])
    profile = QWebEngineProfile()  # off the record: nothing stored, nothing shared
    interceptor = Interceptor()
    profile.setUrlRequestInterceptor(interceptor)
    view = QWebEngineView()
    page = Page(profile, view)
    view.setPage(page)
    # A page opened from a file may not reach the network by default, so a remote reference would
    # fail unseen; allow it, so that every such request reaches the interceptor and is recorded.
    page.settings().setAttribute(QWebEngineSettings.WebAttribute.LocalContentCanAccessRemoteUrls, True)
    view.resize(args.width, args.height or 1200)
    world = QWebEngineScript.ScriptWorldId.ApplicationWorld  # not subject to the page's script ban

    def finish() -> None:
        print(json.dumps(result))
        app.quit()

    def grab_whole_page() -> None:
        # Scroll a viewport down the page and paint each view into one tall image.
        total = min(int(result["probe"]["height"]), 40000)
        step = view.height()
        whole = QImage(view.width(), total, QImage.Format.Format_RGB32)
        whole.fill(0xFFFFFF)
        painter = QPainter(whole)
        tops = list(range(0, max(1, total - step), step)) + [max(0, total - step)]

        def shoot(i: int) -> None:
            painter.drawPixmap(0, tops[i], view.grab())
            if i + 1 < len(tops):
                page.runJavaScript(f"window.scrollTo(0, {tops[i + 1]})", world)
                QTimer.singleShot(300, lambda: shoot(i + 1))
            else:
                painter.end()
                whole.save(args.screenshot)
                finish()

        page.runJavaScript("window.scrollTo(0, 0)", world)
        QTimer.singleShot(300, lambda: shoot(0))

    def got_text(text: str) -> None:
        result["text"] = text
        if not args.screenshot:
            finish()
        elif args.height == 0:
            grab_whole_page()
        else:
            QTimer.singleShot(500, lambda: (view.grab().save(args.screenshot), finish()))

    def probed(value) -> None:
        result["probe"] = json.loads(value) if value else None
        page.toPlainText(got_text)

    def loaded(ok: bool) -> None:
        result["loaded"] = bool(ok)
        page.runJavaScript(PROBE, world, probed)

    page.loadFinished.connect(loaded)
    view.show()
    page.load(page_url)
    QTimer.singleShot(int(args.timeout * 1000), lambda: (result.setdefault("timeout", True), finish()))
    app.exec()
    sys.stdout.flush()
    os._exit(0)  # skip the engine's teardown at interpreter exit: the result is out, nothing else is kept


if __name__ == "__main__":
    sys.exit(main())
