"""How fast the workbench answers: launch to a window showing the samples, a slider move
to the updated decoded view, and a big text (made at run time by benchmarks/bigtext.py):
opening it without event-loop stalls (a 10 ms timer probe; target: no gap over 100 ms),
cancelling a sweep on it (target: within 0.5 s) and peak memory with it loaded and swept
(target: under 2 GB). Prints numbers; asserts nothing.

    QT_QPA_PLATFORM=offscreen PYTHONPATH=. python benchmarks/bench_gui.py [--moves 40] [--big-mb 4] [--big-only]
"""

from __future__ import annotations

import argparse
import json
import os
import statistics
import subprocess
import sys
import time

os.environ.setdefault("QT_QPA_PLATFORM", "offscreen")


def _child_launch() -> None:
    """Runs in a fresh process: report when each stage of the start is reached (wall clock)."""
    stamps = {"imported": 0.0}
    from app.main import application, make_settings
    from app.window import MainWindow
    import tempfile
    from pathlib import Path

    stamps["imported"] = time.time()
    app = application()
    from PySide6.QtCore import QEventLoop, QTimer

    with tempfile.TemporaryDirectory() as tmp:
        window = MainWindow(make_settings(Path(tmp) / "s.ini"))
        window.show()
        app.processEvents()
        stamps["window_shown"] = time.time()
        loop = QEventLoop()

        def poll() -> None:
            entries = list(window.workbench.entries.values())
            if "loaded" not in stamps and entries and all(e.codec is not None for e in entries):
                stamps["loaded"] = time.time()
            if "ready" not in stamps and entries and all(e.ready for e in entries):
                stamps["ready"] = time.time()
            if "first_decode" not in stamps and window.live.shown is not None:
                stamps["first_decode"] = time.time()
            if "whole_text" not in stamps and window.live.result is not None:
                stamps["whole_text"] = time.time()
            if {"loaded", "ready", "first_decode", "whole_text"} <= stamps.keys():
                loop.quit()

        timer = QTimer()
        timer.timeout.connect(poll)
        timer.start(5)
        QTimer.singleShot(120_000, loop.quit)
        loop.exec()
        stamps["samples"] = len(window.workbench.entries)
        window.close()
    print(json.dumps(stamps))


def bench_launch() -> dict:
    started = time.time()
    out = subprocess.run([sys.executable, __file__, "--child-launch"], capture_output=True, text=True,
                         env={**os.environ, "PYTHONPATH": os.getcwd()}, timeout=300)
    line = [ln for ln in out.stdout.splitlines() if ln.startswith("{")]
    if not line:
        raise SystemExit(f"the launch child failed:\n{out.stderr}")
    stamps = json.loads(line[-1])
    return {k: (v - started if isinstance(v, float) else v) for k, v in stamps.items()}


def bench_slider(moves: int) -> dict:
    import numpy as np
    import tempfile
    from pathlib import Path

    from PySide6.QtCore import QEventLoop, QTimer

    from app.main import application, make_settings
    from app.window import MainWindow

    app = application()
    tmp = tempfile.TemporaryDirectory()
    window = MainWindow(make_settings(Path(tmp.name) / "s.ini"))
    window.show()
    live = window.live

    def wait(condition, timeout_s: float = 120.0) -> None:
        loop = QEventLoop()
        timer = QTimer()
        timer.timeout.connect(lambda: loop.quit() if condition() else None)
        timer.start(1)
        QTimer.singleShot(int(timeout_s * 1000), loop.quit)
        loop.exec()

    wait(lambda: window.workbench.entries and all(e.ready for e in window.workbench.entries.values())
         and live.result is not None and live.task is None)
    entry = window.workbench.entry()
    rng = np.random.default_rng(0)
    screen, whole = [], []
    for value in rng.uniform(0.05, 1.0, moves):
        shown = {}
        live.decoded_updated.connect(lambda gen: shown.setdefault(gen, time.perf_counter()))
        t0 = time.perf_counter()
        live.slider.setValue(float(value))
        gen = live.generation
        wait(lambda: gen in shown)
        screen.append((shown[gen] - t0) * 1000)
        wait(lambda: live.result is not None and live.result_params == live._params() and live.task is None)
        whole.append((time.perf_counter() - t0) * 1000)
        live.decoded_updated.disconnect()
    window.close()
    tmp.cleanup()
    return {
        "checkpoint": entry.name, "tokens": entry.chunks.num_tokens, "chunks": entry.chunks.num_chunks, "moves": moves,
        "on_screen_ms_median": statistics.median(screen), "on_screen_ms_p90": float(np.percentile(screen, 90)),
        "whole_text_ms_median": statistics.median(whole), "whole_text_ms_p90": float(np.percentile(whole, 90)),
    }


def _child_big_text(path: str) -> None:
    """Runs in a fresh process: open a big text in the window, sweep it, cancel, and report."""
    import resource
    import tempfile
    from pathlib import Path

    import torch
    from PySide6.QtCore import QElapsedTimer, QEventLoop, QTimer

    from app.main import application, make_settings
    from app.window import MainWindow
    from core.engine.sweep import SweepSettings

    torch.set_num_threads(1)
    app = application()
    tmp = tempfile.TemporaryDirectory()
    window = MainWindow(make_settings(Path(tmp.name) / "s.ini"))
    window.show()
    wb = window.workbench

    def wait(condition, timeout_s: float = 900.0) -> bool:
        loop = QEventLoop()
        timer = QTimer()
        timer.timeout.connect(lambda: loop.quit() if condition() else None)
        timer.start(2)
        QTimer.singleShot(int(timeout_s * 1000), loop.quit)
        loop.exec()
        return condition()

    settled = lambda: wb.entries and all(e.ready for e in wb.entries.values()) and window.live.task is None
    wait(settled)
    gaps: list[float] = []
    clock = QElapsedTimer()
    clock.start()
    last = [clock.elapsed()]

    def tick() -> None:
        now = clock.elapsed()
        gaps.append(now - last[0])
        last[0] = now

    probe = QTimer()
    probe.timeout.connect(tick)
    probe.start(10)
    t0 = time.perf_counter()
    wb.open_text_file(path)
    call_s = time.perf_counter() - t0
    wait(lambda: wb.text_sha and all(e.text_sha == wb.text_sha for e in wb.entries.values()) and settled())
    ready_s = time.perf_counter() - t0
    open_gaps = list(gaps)
    ended: dict = {}
    wb.sweep_ended.connect(lambda p, how: ended.setdefault("how", (how, time.perf_counter())))
    settings = SweepSettings(sigmas=(0.0, 0.1, 0.3), repeats=1)
    wb.start_sweep(settings)
    wait(lambda: False, 4.0)  # let it run
    t_cancel = time.perf_counter()
    wb.cancel_sweep()
    wait(lambda: "how" in ended, 60.0)
    cancel_s = ended["how"][1] - t_cancel if "how" in ended else float("nan")
    ended.clear()
    gaps.clear()
    t1 = time.perf_counter()
    wb.start_sweep(SweepSettings(sigmas=(0.0, 0.3), repeats=1))
    wait(lambda: "how" in ended)
    sweep_s = time.perf_counter() - t1
    entry = wb.entry()
    print(json.dumps({
        "tokens": entry.chunks.num_tokens, "open_call_s": call_s, "open_ready_s": ready_s,
        "open_max_gap_ms": max(open_gaps, default=0), "open_gaps_over_100ms": sum(g > 100 for g in open_gaps),
        "cancel_s": cancel_s, "sweep_s": sweep_s, "sweep_max_gap_ms": max(gaps, default=0),
        "sweep_end": ended.get("how", ("?",))[0],
        "peak_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024,
    }))
    window.close()
    tmp.cleanup()


def bench_big_text(megabytes: float) -> dict:
    import tempfile
    from pathlib import Path

    sys.path.insert(0, str(Path(__file__).resolve().parent))
    from bigtext import write_benchmark_text

    with tempfile.TemporaryDirectory() as tmp:
        path = write_benchmark_text(Path(tmp) / "big.txt", megabytes)
        out = subprocess.run(["nice", "-n", "10", sys.executable, __file__, "--child-big", str(path)], capture_output=True,
                             text=True, env={**os.environ, "PYTHONPATH": os.getcwd()}, timeout=3600)
    line = [ln for ln in out.stdout.splitlines() if ln.startswith("{")]
    if not line:
        raise SystemExit(f"the big-text child failed:\n{out.stderr[-3000:]}")
    return json.loads(line[-1])


def main() -> None:
    parser = argparse.ArgumentParser()
    parser.add_argument("--moves", type=int, default=40)
    parser.add_argument("--big-mb", type=float, default=4.0)
    parser.add_argument("--big-only", action="store_true", help="only the big-text measurements")
    parser.add_argument("--child-launch", action="store_true", help=argparse.SUPPRESS)
    parser.add_argument("--child-big", help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.child_launch:
        _child_launch()
        return
    if args.child_big:
        _child_big_text(args.child_big)
        return
    if args.big_only:
        report_big_text(args.big_mb)
        return
    import torch

    print(f"machine: {os.cpu_count()} cores, torch threads {torch.get_num_threads()}, load average "
          f"{' '.join(f'{x:.2f}' for x in os.getloadavg())}")
    launch = bench_launch()
    print("launch (seconds from starting the process)")
    print(f"  imports done                        {launch['imported']:6.2f}")
    print(f"  window shown, samples listed        {launch['window_shown']:6.2f}")
    print(f"  all {launch['samples']} samples loaded                {launch['loaded']:6.2f}")
    print(f"  text encoded by every sample        {launch['ready']:6.2f}")
    print(f"  first decoded view (on screen)      {launch['first_decode']:6.2f}")
    print(f"  first whole-text numbers            {launch['whole_text']:6.2f}")
    slider = bench_slider(args.moves)
    print(f"slider move -> decoded view, {slider['checkpoint']} on {slider['tokens']:,} tokens / {slider['chunks']:,} chunks, "
          f"{slider['moves']} moves")
    print(f"  on-screen part shown     median {slider['on_screen_ms_median']:7.1f} ms   p90 {slider['on_screen_ms_p90']:7.1f} ms")
    print(f"  whole text + numbers     median {slider['whole_text_ms_median']:7.1f} ms   p90 {slider['whole_text_ms_p90']:7.1f} ms")
    report_big_text(args.big_mb)


def report_big_text(megabytes: float) -> None:
    big = bench_big_text(megabytes)
    print(f"a {megabytes:g} MB text ({big['tokens']:,} tokens) in the workbench")
    print(f"  opening it: the call took {big['open_call_s']:.2f} s; every sample ready after {big['open_ready_s']:.1f} s")
    print(f"  longest event-loop gap while opening {big['open_max_gap_ms']:.0f} ms, {big['open_gaps_over_100ms']} gaps over 100 ms"
          "   (target: none over 100 ms)")
    print(f"  cancel of a running sweep acted after {big['cancel_s']:.2f} s   (target <= 0.5 s)")
    print(f"  a 2-σ sweep of it ({big['sweep_end']}) took {big['sweep_s']:.1f} s; longest gap {big['sweep_max_gap_ms']:.0f} ms")
    print(f"  peak memory, loaded and swept: {big['peak_mb']:.0f} MB   (target < 2048 MB)")


if __name__ == "__main__":
    main()
