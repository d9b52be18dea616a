"""Start the workbench, or make a screenshot of one view offscreen and exit."""

from __future__ import annotations

import os
import sys
import tempfile
import time
from pathlib import Path

SETTINGS_ENV = "CHUNKSCOPE_SETTINGS"  # path of an .ini file to keep settings in (tests use a temp one)
SCREENSHOT_TIMEOUT_S = 900


def make_settings(path: str | os.PathLike | None = None):
    from PySide6.QtCore import QSettings

    path = path or os.environ.get(SETTINGS_ENV)
    if path:
        return QSettings(str(path), QSettings.Format.IniFormat)
    return QSettings("chunkscope", "chunkscope")


def application():
    from PySide6.QtWidgets import QApplication

    from app.style import apply_theme

    app = QApplication.instance()
    if app is None:
        app = QApplication(sys.argv[:1])
        app.setApplicationName("chunkscope")
        app.setOrganizationName("chunkscope")
    apply_theme(app)
    # torch is not imported here: it loads in the first background task (core.deferred), and
    # each task thread sets its own thread count (app.workers)
    return app


def run_workbench(screenshot: str | None = None, view: str | None = None) -> int:
    """Open the window with the sample checkpoints and the demo text; with `screenshot`,
    run what `view` shows, save a PNG of the window and return 0."""
    if screenshot:
        os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")
    from app.system_libraries import missing_libraries_message

    problem = missing_libraries_message(os.environ)  # else Qt aborts the process (exit 134) when one is missing
    if problem:
        print(problem, file=sys.stderr)
        return 1
    app = application()
    from app.window import VIEWS, MainWindow

    if view is not None and view not in VIEWS:
        print(f"chunkscope: there is no view {view!r}; choose one of {', '.join(VIEWS)}.", file=sys.stderr)
        return 2
    if not screenshot:
        window = MainWindow(make_settings())
        if view:
            window.show_view(view)
        window.show()
        return app.exec()

    with tempfile.TemporaryDirectory(prefix="chunkscope-shot-") as tmp:
        window = MainWindow(make_settings(Path(tmp) / "settings.ini"))
        shooter = Screenshot(window, Path(screenshot), view or "live")
        window.show()
        return shooter.run(app)


class Screenshot:
    """Drives the window to a finished state for one view, then grabs it."""

    def __init__(self, window, path: Path, view: str):
        self.window = window
        self.path = path
        self.view = view
        self.stage = "loading"
        self.code = 1
        self.started = time.perf_counter()

    def run(self, app) -> int:
        from PySide6.QtCore import QEventLoop, QTimer

        self.app = app
        self.loop = QEventLoop()
        self.window.show_view(self.view)
        self.window.workbench.sweep_ended.connect(self._sweep_ended)
        self.window.workbench.error.connect(self._fail)
        self.window.compare.error.connect(self._fail)
        self.window.trend.error.connect(self._fail)
        self.window.predictions.error.connect(self._fail)
        self.timer = QTimer()
        self.timer.setInterval(100)
        self.timer.timeout.connect(self._tick)
        self.timer.start()
        self.loop.exec()  # a local loop: quitting it leaves any other window of the process running
        return self.code

    def _fail(self, message: str) -> None:
        print(f"chunkscope: screenshot failed: {message}", file=sys.stderr)
        self.code = 1
        self._quit()

    def _quit(self) -> None:
        self.timer.stop()
        self.window.close()
        self.loop.quit()

    def _sweep_ended(self, _path: str, how: str) -> None:
        if how != "done":
            self._fail(f"the sweep ended: {how}")

    def _tick(self) -> None:
        w = self.window
        wb = w.workbench
        if time.perf_counter() - self.started > SCREENSHOT_TIMEOUT_S:
            return self._fail(f"the window did not finish within {SCREENSHOT_TIMEOUT_S} s")
        entries = list(wb.entries.values())
        if self.stage == "loading":
            if not entries:
                return self._fail(w.message.text() or "no checkpoint could be opened")
            if any(e.codec is None or not e.ready or e.health is None for e in entries):
                return
            if self.view in ("sweep", "latent", "worstcase"):  # a variational codec fills these views best
                variational = [e for e in entries if e.codec.variational]
                if variational:
                    wb.select(variational[0].path)
            self.stage = "working"
            if self.view in ("sweep", "tokens", "latent"):
                if not w.sweep.run():
                    return self._fail(w.message.text() or "the sweep did not start")
            elif self.view == "compare":  # a small grid and one repeat keep the shot quick
                w.compare.restore({"start": 0.02, "stop": 2.0, "points": 8, "spacing": "log", "zero": True, "repeats": 1})
                if not w.compare.run():
                    return self._fail(w.message.text() or "the comparison did not start")
            elif self.view == "worstcase":
                if not w.panels["worstcase"].run():
                    return self._fail(w.message.text() or "the worst-case search did not start")
            elif self.view == "predictions":  # the shipped demo generator's predictions for the demo text
                from app.state import samples_folder

                w.open_predictions(str(samples_folder() / "generator" / "demo_predictions.safetensors"))
            elif self.view == "trend":  # the shipped sample run
                from app.panel_trend import default_run_folder

                w.trend.restore({"start": 0.02, "stop": 2.0, "points": 8, "spacing": "log", "zero": True, "repeats": 1})
                if not w.trend.run_folder(default_run_folder() or w.trend.folder):
                    return self._fail(w.message.text() or "the training-run trend did not start")
            return
        if self.stage == "working":
            entry = wb.entry()
            if self.view == "live":
                if w.live.result is None or w.live.task is not None:
                    return
            elif self.view == "compare":
                c = w.compare
                if c.comparison is None or c.is_running() or c.text_view_busy():
                    return
            elif self.view == "trend":
                if w.trend.is_running() or not w.trend.points:
                    return
            elif self.view == "worstcase":
                if w.panels["worstcase"].busy() or w.panels["worstcase"].result is None:
                    return
            elif self.view == "predictions":
                if w.predictions.is_running() or w.predictions.result is None:
                    return
            elif entry.sweep is None:
                return
            elif self.view == "tokens" and w.tokens._task is not None and not w.tokens._task.done.is_set():
                return
            self.stage = "settling"
            self.settle_until = time.perf_counter() + 0.6
            return
        if self.stage == "settling" and time.perf_counter() >= self.settle_until:
            self.app.processEvents()
            image = w.grab()
            self.path.parent.mkdir(parents=True, exist_ok=True)
            if not image.save(str(self.path), "PNG"):
                return self._fail(f"could not write {self.path}")
            print(f"saved {self.path} ({image.width()}x{image.height()})")
            self.code = 0
            self._quit()


def main() -> int:
    return run_workbench()


if __name__ == "__main__":
    sys.exit(main())
