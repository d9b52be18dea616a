"""Sweep speed and memory, printed as ratios (run by hand; never part of the tests).

1. decode throughput of a sweep vs. a bare loop of codec.decode + argmax over the same
   latents at that loop's best batch size, alternating the two (target: ratio >= 0.90);
2. encode calls per sweep (target: once per chunk batch, independent of the grid);
3. peak memory of a sweep over ~1,000,000 tokens vs ~10,000 tokens, each in a fresh
   process (target: within 1 GB).

    python benchmarks/bench_sweep.py [--checkpoint sample_models/plain.safetensors] [--skip-memory]
"""

from __future__ import annotations

import argparse
import json
import statistics
import subprocess
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

import torch  # noqa: E402

from core.codecs.checkpoint import load_codec  # noqa: E402
from core.engine.noise import encode_chunks  # noqa: E402
from core.engine.sweep import SweepSettings, run_sweep  # noqa: E402
from core.engine.text import chunk_text, demo_text  # noqa: E402

DEFAULT_CHECKPOINT = ROOT / "sample_models" / "plain.safetensors"


def bare_loop(codec, z: torch.Tensor, batch: int, rounds: int) -> float:
    """Chunks per second of decode + argmax alone."""
    n = z.shape[0]
    started = time.perf_counter()
    for _ in range(rounds):
        for start in range(0, n, batch):
            codec.decode(z[start : start + batch]).argmax(-1)
    return rounds * n / (time.perf_counter() - started)


def sweep_rate(codec, chunks, encoded, sigmas, batch: int) -> float:
    settings = SweepSettings(sigmas=sigmas, repeats=2, noise="isotropic", batch_chunks=batch)
    result = run_sweep(codec, chunks, settings, encoded=encoded)
    return result.decoded_chunks / result.elapsed_s


def throughput(codec, chunks, rounds: int = 7) -> None:
    """Find the bare loop's best batch size, then alternate bare loop and sweep runs so both
    see the same machine (this VM's speed drifts by 10-20 % over a minute) and compare medians."""
    encoded = encode_chunks(codec, chunks)
    z = encoded.mean + 0.1 * torch.randn_like(encoded.mean)
    sigmas = (0.0, 0.05, 0.1, 0.2, 0.4, 0.8)
    best_batch, best = None, 0.0
    for batch in (128, 256, 512, 1024, 2048, 4096):
        bare_loop(codec, z, batch, 1)  # warm up
        rate = statistics.median(bare_loop(codec, z, batch, 2) for _ in range(3))
        print(f"  bare decode+argmax, batch {batch:5d}: {rate:10.0f} chunks/s (median of 3)")
        if rate > best:
            best_batch, best = batch, rate
    default = SweepSettings().batch_chunks
    sweep_rate(codec, chunks, encoded, sigmas, default)  # warm up
    bare, sweep, ratios = [], [], []
    for _ in range(rounds):
        bare.append(bare_loop(codec, z, best_batch, 2))
        sweep.append(sweep_rate(codec, chunks, encoded, sigmas, default))
        ratios.append(sweep[-1] / bare[-1])
    print(f"  alternating {rounds} rounds: bare loop at batch {best_batch} median {statistics.median(bare):.0f} chunks/s, "
          f"sweep (all metrics) at batch {default} median {statistics.median(sweep):.0f} chunks/s")
    print(f"  per-round ratios: {' '.join(f'{r:.3f}' for r in ratios)}")
    print(f"ratio sweep / bare loop (median of rounds) = {statistics.median(ratios):.3f}   (target >= 0.90)")


class CountingCodec:
    def __init__(self, inner):
        self.inner = inner
        self.encode_calls = 0
        self.decode_calls = 0

    def __getattr__(self, name):
        return getattr(self.inner, name)

    def encode(self, ids):
        self.encode_calls += 1
        return self.inner.encode(ids)

    def decode(self, z):
        self.decode_calls += 1
        return self.inner.decode(z)


def encode_once(codec, chunks) -> None:
    for grid in ((0.0, 0.1), tuple(i / 20 for i in range(21))):
        counting = CountingCodec(codec)
        run_sweep(counting, chunks, SweepSettings(sigmas=grid, repeats=2))
        print(f"  grid of {len(grid):2d} sigmas x 2 repeats: {counting.encode_calls} encode call(s), {counting.decode_calls} decode calls")


MEMORY_CHILD = """
import resource, sys, json
sys.path.insert(0, {root!r})
from core.codecs.checkpoint import load_codec
from core.engine.sweep import SweepSettings, run_sweep
from core.engine.text import chunk_text, demo_text
codec = load_codec({ckpt!r})
base = demo_text()
chunks = chunk_text(base, codec)
copies = max(1, round({tokens} / chunks.num_tokens))
text = "\\n".join(base for _ in range(copies))
chunks = chunk_text(text, codec)
del text, base
before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
result = run_sweep(codec, chunks, SweepSettings(sigmas=(0.0, 0.3), repeats=1, noise="data-scale"))
peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss
print(json.dumps({{"tokens": chunks.num_tokens, "peak_mb": peak / 1024, "before_sweep_mb": before / 1024, "elapsed_s": result.elapsed_s}}))
"""


def memory(checkpoint: Path) -> None:
    rows = []
    for tokens in (10_000, 1_000_000):
        code = MEMORY_CHILD.format(root=str(ROOT), ckpt=str(checkpoint), tokens=tokens)
        out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True)
        row = json.loads(out.stdout.strip().splitlines()[-1])
        rows.append(row)
        print(f"  {row['tokens']:>9,} tokens: peak RSS {row['peak_mb']:8.1f} MB (sweep took {row['elapsed_s']:.1f}s)")
    diff = rows[1]["peak_mb"] - rows[0]["peak_mb"]
    print(f"peak memory difference 1M vs 10k tokens: {diff:.0f} MB   (target <= 1024 MB)")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--checkpoint", default=str(DEFAULT_CHECKPOINT))
    parser.add_argument("--skip-memory", action="store_true")
    parser.add_argument("--threads", type=int, default=torch.get_num_threads())
    args = parser.parse_args()
    torch.set_num_threads(args.threads)
    codec = load_codec(args.checkpoint)
    chunks = chunk_text(demo_text(), codec)
    print(f"{codec.name}: V={codec.vocab_size}, D={codec.latent_dim}, {codec.num_parameters:,} parameters; "
          f"demo text {chunks.num_tokens:,} tokens = {chunks.num_chunks:,} chunks; torch threads {torch.get_num_threads()}")
    print("1. decode throughput")
    throughput(codec, chunks)
    print("2. encoding happens once per sweep")
    encode_once(codec, chunks)
    if not args.skip_memory:
        print("3. peak memory")
        memory(Path(args.checkpoint))


if __name__ == "__main__":
    main()
