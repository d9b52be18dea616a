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
    started = time.perf_counter()
    if args.mode == "one":
        result = run_sweep(codec, chunks, settings)
    else:
        ready = {}
        (result,) = run_sweeps([SweepJob(codec, chunks, settings)], Where(workers=args.workers),
                               on_start=lambda client: ready.setdefault("t", time.perf_counter()))
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
    }


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
    one, cl = runs["one"], runs["cluster"]
    assert one["digest"] == cl["digest"] and one["accuracy"] == cl["accuracy"], "the sharded sweep differs from the one-process sweep"
    speedup = one["elapsed_s"] / cl["elapsed_s"]
    compute = cl["elapsed_s"] - cl["cluster_start_s"]
    print(f"{one['tokens']:,} tokens, {one['decoded_chunks']:,} decoded chunks; results identical (counts, accuracy)")
    print(f"speedup with {args.workers} workers: {speedup:.2f}x (target >= 1.7x), parallel efficiency {speedup / args.workers:.0%}")
    print(f"  without the cluster's start-up ({cl['cluster_start_s']:.1f} s): {one['elapsed_s'] / compute:.2f}x")
    print(f"client peak memory / one-process sweep's: {cl['peak_rss_mb'] / one['peak_rss_mb']:.2f}")


if __name__ == "__main__":
    main()
