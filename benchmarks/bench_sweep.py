"""Sweep speed and memory, printed as ratios (run by hand; never part of the tests).

1. decode throughput of a sweep vs. a bare loop of codec.decode + argmax over the same
   latents at that loop's best batch size, alternating the two (target: ratio >= 0.90);
2. encode calls per sweep (target: once per chunk batch, independent of the grid, plus for
   data-scale noise one pass over the text for r);
3. scale, each measurement in a fresh process (nice 10, one torch thread), on a big text made
   at run time from this machine's own texts (benchmarks/bigtext.py, never committed):
   - throughput on the big text vs a 100k-token text (target: ratio >= 0.85);
   - cost of a 5-σ grid vs a 1-σ grid (σ = 0 is on both; target: <= 5.5);
   - peak memory of the sweep minus its per-token results (target: <= 1024 MB);
   - the time-left estimate (core.engine.timeleft) against the truth at 5, 10 and 25 % of
     the work (target: within 2x), and the fraction of the work before it is first shown;
   - peak memory of `chunkscope info` on the big text (target: < 1024 MB).

    python benchmarks/bench_sweep.py [--checkpoint sample_models/plain.safetensors] [--skip-memory]
        [--big-mb 20] [--scale-only] [--code OTHER_CHECKOUT]   # --code: measure another checkout's engine
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


SCALE_CHILD = """
import json, resource, sys, time
sys.path.insert(0, {root!r})
import torch
torch.set_num_threads(1)
from core.codecs.checkpoint import load_codec
from core.engine.sweep import SweepSettings, run_sweep
from core.engine.text import Chunks, chunk_text
codec = load_codec({ckpt!r})
text = open({text!r}, encoding="utf-8").read()
tokens = {tokens}
if tokens:
    text = text[: tokens * 4]
chunks = chunk_text(text, codec)
if tokens:
    chunks = Chunks(text, chunks.text_sha256, chunks.token_ids[:tokens], chunks.spans[:tokens], chunks.chunk_size, chunks.pad_id)
del text
before = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
marks = []
step = [0.0]
def progress(done, total):
    if done / total >= step[0] or done == total:
        marks.append((time.monotonic(), done, total))
        step[0] = done / total + 0.002
result = run_sweep(codec, chunks, SweepSettings(sigmas={sigmas!r}, repeats={repeats}, noise="data-scale"), progress=progress)
peak = resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024
evaluations = chunks.num_chunks * {repeats} * len(result.settings.sigmas)
print(json.dumps({{"tokens": chunks.num_tokens, "chunks": chunks.num_chunks, "sigmas": len(result.settings.sigmas),
                  "elapsed_s": result.elapsed_s, "evaluations_per_s": evaluations / result.elapsed_s,
                  "before_sweep_mb": before, "peak_mb": peak,
                  "per_token_mb": (result.wrong_counts.nbytes + result.decoded.nbytes) / 2**20, "marks": marks}}))
"""

INFO_CHILD = """
import contextlib, io, json, resource, sys, time
sys.path.insert(0, {root!r})
import torch
torch.set_num_threads(1)
from core.cli import main
started = time.perf_counter()
with contextlib.redirect_stdout(io.StringIO()):
    code = main(["info", {ckpt!r}, "--text", {text!r}, "--json"])
print(json.dumps({{"code": code, "elapsed_s": time.perf_counter() - started,
                  "peak_mb": resource.getrusage(resource.RUSAGE_SELF).ru_maxrss / 1024}}))
"""


def _child(code: str) -> dict:
    out = subprocess.run(["nice", "-n", "10", sys.executable, "-c", code], capture_output=True, text=True)
    if out.returncode != 0:
        raise SystemExit(f"a benchmark child failed:\\n{out.stderr[-2000:]}")
    return json.loads(out.stdout.strip().splitlines()[-1])


def time_left_check(marks: list) -> None:
    """Replay the sweep's progress through the estimator the CLI and the workbench show."""
    from core.engine.timeleft import TimeLeft

    clock = [0.0]
    left = TimeLeft(lambda: clock[0])
    end = marks[-1][0]
    shown_at, checks = None, {0.05: None, 0.10: None, 0.25: None}
    for t, done, total in marks:
        clock[0] = t
        estimate = left.update(done, total)
        if estimate is not None and shown_at is None:
            shown_at = done / total
        for frac in checks:
            if checks[frac] is None and estimate is not None and done / total >= frac:
                checks[frac] = (estimate, end - t)
    print(f"  time left first shown at {100 * (shown_at or 0):.1f} % of the work")
    for frac, pair in checks.items():
        if pair:
            est, truth = pair
            print(f"  at {100 * frac:3.0f} %: estimate {est:7.1f} s, truth {truth:7.1f} s, ratio {est / truth:.2f}   (target 0.5-2)")


def scale(root: Path, checkpoint: Path, big_mb: float, sigmas: tuple, grid5: tuple) -> None:
    import tempfile

    sys.path.insert(0, str(ROOT / "benchmarks"))
    from bigtext import write_benchmark_text

    with tempfile.TemporaryDirectory() as tmp:
        big = write_benchmark_text(Path(tmp) / "big.txt", big_mb)
        print(f"  big text: {big.stat().st_size / 1e6:.1f} MB from this machine's docstrings, licences and copyright files")
        common = dict(root=str(root), ckpt=str(checkpoint), text=str(big))
        small = _child(SCALE_CHILD.format(tokens=100_000, sigmas=sigmas, repeats=1, **common))
        small5 = _child(SCALE_CHILD.format(tokens=100_000, sigmas=grid5, repeats=1, **common))
        large = _child(SCALE_CHILD.format(tokens=0, sigmas=sigmas, repeats=1, **common))
        info = _child(INFO_CHILD.format(**common))
    for name, row in (("100k tokens, 1 σ", small), ("100k tokens, 5 σ", small5), (f"{large['tokens']:,} tokens, 1 σ", large)):
        print(f"  {name:>24}: {row['chunks']:>9,} chunks, {row['sigmas']} grid points, {row['elapsed_s']:7.1f} s, "
              f"{row['evaluations_per_s']:8.0f} chunk·σ/s, peak {row['peak_mb']:6.0f} MB (per-token results {row['per_token_mb']:.0f} MB)")
    print(f"throughput big / 100k-token text = {large['evaluations_per_s'] / small['evaluations_per_s']:.3f}   (target >= 0.85)")
    print(f"cost of the 5-σ grid / the 1-σ grid = {small5['elapsed_s'] / small['elapsed_s']:.2f}   (target <= 5.5)")
    extra = large["peak_mb"] - large["per_token_mb"]
    print(f"peak memory of the big sweep minus its per-token results = {extra:.0f} MB   (target <= 1024 MB)")
    time_left_check(large["marks"])
    print(f"info on the big text: peak {info['peak_mb']:.0f} MB in {info['elapsed_s']:.0f} s   (target < 1024 MB)")


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__, formatter_class=argparse.RawDescriptionHelpFormatter)
    parser.add_argument("--checkpoint", default=str(DEFAULT_CHECKPOINT))
    parser.add_argument("--skip-memory", action="store_true", help="skip the scale measurements (3.)")
    parser.add_argument("--scale-only", action="store_true", help="only the scale measurements (3.)")
    parser.add_argument("--big-mb", type=float, default=20.0, help="size of the big text in MB (default 20)")
    parser.add_argument("--code", default=str(ROOT), help="the checkout whose engine the scale children run")
    parser.add_argument("--threads", type=int, default=1)
    args = parser.parse_args()
    torch.set_num_threads(args.threads)
    if not args.scale_only:
        codec = load_codec(args.checkpoint)
        chunks = chunk_text(demo_text(), codec)
        print(f"{codec.name}: V={codec.vocab_size}, D={codec.latent_dim}; "
              f"demo text {chunks.num_tokens:,} tokens = {chunks.num_chunks:,} chunks; torch threads {torch.get_num_threads()}")
        print("1. decode throughput")
        throughput(codec, chunks)
        print("2. encoding happens once per sweep")
        encode_once(codec, chunks)
    if not args.skip_memory:
        print("3. scale")
        scale(Path(args.code), Path(args.checkpoint), args.big_mb, (0.0, 0.3), (0.0, 0.1, 0.2, 0.3, 0.4, 0.5))


if __name__ == "__main__":
    main()
