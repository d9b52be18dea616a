"""A sharded sweep on a local Dask cluster against one process, printed as ratios (run by hand).

The demo text repeated to about --tokens tokens (default 1,000,000) is swept twice, each in a
fresh process: once in that process with one torch thread, once by a client handing its
shards to `--workers` local worker processes (one thread each). Printed: the speedup, the
parallel efficiency (speedup / workers; aim: speedup >= 1.7 with 2 workers), and the client's
peak memory (its own RSS, not the workers') against the one-process sweep's. Both results are
checked equal (counts exactly).

Where the time goes: each step of the sweep in the client (planning, folding shards in, the
merge) with its wall and CPU seconds, the CPU seconds of every worker process and of the
sweep-shard tasks themselves, and a CPU-seconds ratio (one process against the client's serial
work plus the busiest worker), which a busy machine disturbs less than wall time. Last, the
machine's own ceiling: N independent one-thread processes decoding at once against one alone,
without Dask; on a virtual machine two vCPUs can be the two hyperthreads of one core, and then
no sharding reaches 2x.

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
            client.run(_count_task_cpu)

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
        "shard_task_cpu_s": result.provenance.get("ran_on", {}).get("worker_seconds"),
        "cpu_s": time.process_time() - cpu_started,
        "workers_cpu_s": sorted(last for first, last in workers_cpu.values()),
        "workers_startup_cpu_s": sorted(first for first, last in workers_cpu.values()),
    }


def _count_task_cpu() -> None:
    """On a worker: make each sweep shard report the CPU seconds of the thread that ran it as its
    elapsed_s (so the result's ran_on.worker_seconds adds the tasks' own CPU time, for this benchmark only)."""
    import dataclasses

    from core.engine import cluster

    inner = cluster._shard_task

    def counted(*args):
        c0 = time.thread_time()
        shard = inner(*args)
        return dataclasses.replace(shard, elapsed_s=time.thread_time() - c0)

    cluster._shard_task = counted


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


def run_ceiling(args) -> dict:
    """In this (fresh) process, one thread: decode the same random latents `--ceiling-steps` times; elapsed."""
    import torch

    torch.set_num_threads(1)
    from core.codecs.open import open_checkpoint

    codec = open_checkpoint(args.checkpoint)
    z = torch.randn(512, codec.latent_dim, generator=torch.Generator().manual_seed(0))
    with torch.inference_mode():
        codec.decode(z)
        started = time.perf_counter()
        for _ in range(args.ceiling_steps):
            codec.decode(z)
    return {"elapsed_s": time.perf_counter() - started}


def ceiling(args, env) -> float:
    """The machine's own ceiling: throughput of `workers` independent one-thread processes decoding at once,
    against one alone (two vCPUs of a virtual machine may be two hyperthreads of one core)."""
    cmd = [sys.executable, __file__, "--mode", "ceiling", "--checkpoint", args.checkpoint,
           "--ceiling-steps", str(args.ceiling_steps)]
    alone = json.loads(subprocess.run(cmd, check=True, capture_output=True, text=True, env=env).stdout.strip().splitlines()[-1])
    procs = [subprocess.Popen(cmd, stdout=subprocess.PIPE, text=True, env=env) for _ in range(args.workers)]
    together = [json.loads(proc.communicate()[0].strip().splitlines()[-1]) for proc in procs]
    return args.workers * alone["elapsed_s"] / max(t["elapsed_s"] for t in together)


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--checkpoint", default=str(DEFAULT_CHECKPOINT))
    parser.add_argument("--tokens", type=int, default=1_000_000)
    parser.add_argument("--workers", type=int, default=2)
    parser.add_argument("--sigmas", default="0,0.1,0.3,1")
    parser.add_argument("--repeats", type=int, default=2)
    parser.add_argument("--ceiling-steps", type=int, default=300,
                        help="decodes of 512 chunks for the machine's own ceiling (0: skip it)")
    parser.add_argument("--mode", choices=("one", "cluster", "ceiling"), help=argparse.SUPPRESS)
    args = parser.parse_args()
    if args.mode:
        print(json.dumps(run_ceiling(args) if args.mode == "ceiling" else run_one(args)))
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
        if runs[mode].get("shard_task_cpu_s") is not None:
            print(f"         CPU seconds inside the sweep-shard tasks, all workers: {runs[mode]['shard_task_cpu_s']:.1f}")
    one, cl = runs["one"], runs["cluster"]
    assert one["digest"] == cl["digest"] and one["accuracy"] == cl["accuracy"], "the sharded sweep differs from the one-process sweep"
    speedup = one["elapsed_s"] / cl["elapsed_s"]
    compute = cl["elapsed_s"] - cl["cluster_start_s"]
    print(f"{one['tokens']:,} tokens, {one['decoded_chunks']:,} decoded chunks; results identical (counts, accuracy)")
    print(f"speedup with {args.workers} workers: {speedup:.2f}x (target >= 1.7x), parallel efficiency {speedup / args.workers:.0%}")
    print(f"  without the cluster's start-up ({cl['cluster_start_s']:.1f} s): {one['elapsed_s'] / compute:.2f}x")
    print(f"client peak memory / one-process sweep's: {cl['peak_rss_mb'] / one['peak_rss_mb']:.2f}")
    if args.ceiling_steps:
        env = {**os.environ, "OMP_NUM_THREADS": "1", "MKL_NUM_THREADS": "1"}
        print(f"this machine's ceiling: {args.workers} independent one-thread processes decode {ceiling(args, env):.2f}x "
              "as fast as one (no Dask, no sharding; the speedup above cannot beat it)")
    if cl["workers_cpu_s"]:  # on a busy machine wall time measures the scheduler's share, CPU seconds the work
        serial = sum(cl["phases"].get(step, [0, 0, 0, 0, 0.0])[4] for step in ("plan (client)", "merge"))
        print(f"CPU seconds, one process / (the client's planning and merge + the busiest worker): "
              f"{one['cpu_s'] / (serial + max(cl['workers_cpu_s'])):.2f}x (the speedup when every process has a core "
              "of its own; on a busy machine this is the steadier number)")


if __name__ == "__main__":
    main()
