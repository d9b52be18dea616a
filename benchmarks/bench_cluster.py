"""A sharded sweep on a local Dask cluster against one process, printed as ratios (run by hand).

The demo text repeated to about --tokens tokens (default 1,000,000) is swept twice, each in a
fresh process: once in that process with one torch thread, once by a client handing its
shards to `--workers` local worker processes (one thread each). Printed: the speedup, the
parallel efficiency (speedup / workers; aim: speedup >= 1.7 with 2 workers), and the client's
peak memory (its own RSS, not the workers') against the one-process sweep's. Both results are
checked equal (counts exactly).

    python benchmarks/bench_cluster.py [--tokens 1000000] [--workers 2] [--sigmas 0,0.1,0.3,1] [--repeats 2]

On a machine others share, time both runs when it is otherwise idle: a busy core shows up as
lost efficiency, not as a cost of sharding.
"""

from __future__ import annotations

import argparse
import json
import os
import resource
import subprocess
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

DEFAULT_CHECKPOINT = ROOT / "sample_models" / "plain.safetensors"


def run_one(args) -> dict:
    """In this (fresh) process: the sweep here, or through a cluster; elapsed, peak RSS, a digest."""
    import hashlib

    import torch

    torch.set_num_threads(1)
    from core.codecs.open import open_checkpoint
    from core.engine.cluster import SweepJob, Where, run_sweeps
    from core.engine.sweep import SweepSettings, parse_sigmas, run_sweep
    from core.engine.text import chunk_text, demo_text

    codec = open_checkpoint(args.checkpoint)
    base = demo_text()
    per_copy = chunk_text(base, codec, "demo").num_tokens
    text = (base + "\n") * max(1, round(args.tokens / per_copy))
    chunks = chunk_text(text, codec, "demo text, repeated")
    settings = SweepSettings(sigmas=parse_sigmas(args.sigmas), repeats=args.repeats).validated(codec)
    started, cpu_started = time.perf_counter(), time.process_time()
    phases = _time_phases(started)
    workers_cpu: dict = {}
    if args.mode == "one":
        result = run_sweep(codec, chunks, settings)
    else:
        ready = {}

        def on_start(client):
            ready.setdefault("t", time.perf_counter())
            _follow_cpu(client.run(os.getpid).values(), workers_cpu)

        (result,) = run_sweeps([SweepJob(codec, chunks, settings)], Where(workers=args.workers), on_start=on_start)
    elapsed = time.perf_counter() - started
    digest = hashlib.sha256(result.wrong_counts.tobytes() + result.decoded.tobytes()).hexdigest()
    return {
        "elapsed_s": elapsed,
        "cluster_start_s": (ready["t"] - started) if args.mode != "one" else 0.0,
        "peak_rss_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024,
        "tokens": chunks.num_tokens,
        "decoded_chunks": result.decoded_chunks,
        "digest": digest,
        "accuracy": [c.token_accuracy for c in result.curves],
        "phases": phases,
        "cpu_s": time.process_time() - cpu_started,
        "workers_cpu_s": sorted(last for first, last in workers_cpu.values()),
        "workers_startup_cpu_s": sorted(first for first, last in workers_cpu.values()),
    }


def _follow_cpu(pids, seen: dict) -> None:
    """Sample the CPU seconds of the worker processes until they exit: {pid: (at the cluster's start, last)}."""
    import threading

    import psutil

    procs = [psutil.Process(pid) for pid in pids]

    def follow():
        while procs:
            for proc in list(procs):
                try:
                    times = proc.cpu_times()
                    seen[proc.pid] = (seen.get(proc.pid, (times.user + times.system,))[0], times.user + times.system)
                except psutil.Error:
                    procs.remove(proc)
            time.sleep(0.1)

    threading.Thread(target=follow, daemon=True).start()


def _time_phases(started: float) -> dict:
    """Wrap the sweep's steps in this process to time them: {step: [calls, seconds in it, first start, last end,
    CPU seconds in it]}
    (starts and ends in seconds since `started`). On a cluster, the client's steps: planning (whatever of
    it runs here), folding each shard in as it arrives, and the final merge."""
    from core.engine import cluster, sweep

    phases: dict = {}

    def wrap(owner, name: str, label: str) -> None:
        inner = getattr(owner, name)

        def timed(*a, **k):
            t0, c0 = time.perf_counter(), time.process_time()
            try:
                return inner(*a, **k)
            finally:
                t1 = time.perf_counter()
                entry = phases.setdefault(label, [0, 0.0, t0 - started, 0.0, 0.0])
                entry[0] += 1
                entry[1] += t1 - t0
                entry[3] = t1 - started
                entry[4] += time.process_time() - c0

        setattr(owner, name, timed)

    wrap(sweep, "plan_sweep", "plan (client)")
    wrap(sweep, "sweep_shard", "sweep shard (here)")
    wrap(sweep, "merge_shards", "merge")
    wrap(cluster._Fold, "add", "fold a shard in (client)")
    return phases


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--checkpoint", default=str(DEFAULT_CHECKPOINT))
    parser.add_argument("--tokens", type=int, default=1_000_000)
    parser.add_argument("--workers", type=int, default=2)
    parser.add_argument("--sigmas", default="0,0.1,0.3,1")
    parser.add_argument("--repeats", type=int, default=2)
    parser.add_argument("--mode", choices=("one", "cluster"), help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.mode:
        print(json.dumps(run_one(args)))
        return
    runs = {}
    for mode in ("one", "cluster"):
        cmd = [sys.executable, __file__, "--mode", mode, "--checkpoint", args.checkpoint, "--tokens", str(args.tokens),
               "--workers", str(args.workers), "--sigmas", args.sigmas, "--repeats", str(args.repeats)]
        env = {**os.environ, "OMP_NUM_THREADS": "1", "MKL_NUM_THREADS": "1"}
        out = subprocess.run(cmd, check=True, capture_output=True, text=True, env=env).stdout
        runs[mode] = json.loads(out.strip().splitlines()[-1])
        print(f"{mode:>7}: {runs[mode]['elapsed_s']:.1f} s, client peak RSS {runs[mode]['peak_rss_mb']:.0f} MB", flush=True)
        if mode == "cluster":
            print(f"         cluster start-up: 0.0 .. {runs[mode]['cluster_start_s']:.1f} s")
        for label, (calls, busy, first, last, cpu) in runs[mode]["phases"].items():
            print(f"         {label}: {calls} call{'s' if calls != 1 else ''}, {busy:.2f} s busy ({cpu:.2f} CPU s), "
                  f"from {first:.1f} s to {last:.1f} s")
        workers = ", ".join(f"{w:.1f}" for w in runs[mode]["workers_cpu_s"])
        startup = ", ".join(f"{w:.1f}" for w in runs[mode].get("workers_startup_cpu_s", []))
        print(f"         CPU seconds: this process {runs[mode]['cpu_s']:.1f}"
              + (f"; workers {workers} (of which {startup} before the cluster answered)" if workers else ""))
    one, cl = runs["one"], runs["cluster"]
    assert one["digest"] == cl["digest"] and one["accuracy"] == cl["accuracy"], "the sharded sweep differs from the one-process sweep"
    speedup = one["elapsed_s"] / cl["elapsed_s"]
    compute = cl["elapsed_s"] - cl["cluster_start_s"]
    print(f"{one['tokens']:,} tokens, {one['decoded_chunks']:,} decoded chunks; results identical (counts, accuracy)")
    print(f"speedup with {args.workers} workers: {speedup:.2f}x (target >= 1.7x), parallel efficiency {speedup / args.workers:.0%}")
    print(f"  without the cluster's start-up ({cl['cluster_start_s']:.1f} s): {one['elapsed_s'] / compute:.2f}x")
    print(f"client peak memory / one-process sweep's: {cl['peak_rss_mb'] / one['peak_rss_mb']:.2f}")
    if cl["workers_cpu_s"]:  # on a busy machine wall time measures the scheduler's share, CPU seconds the work
        serial = sum(cl["phases"].get(step, [0, 0, 0, 0, 0.0])[4] for step in ("plan (client)", "merge"))
        print(f"CPU seconds, one process / (the client's planning and merge + the busiest worker): "
              f"{one['cpu_s'] / (serial + max(cl['workers_cpu_s'])):.2f}x (the speedup when every process has a core "
              "of its own; on a busy machine this is the steadier number)")


if __name__ == "__main__":
    main()
