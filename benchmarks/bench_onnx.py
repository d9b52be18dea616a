"""ONNX (onnxruntime, CPU) vs torch on the transformer sample, printed as ratios (run by hand).

1. encode and decode throughput (chunks per second) of the same model opened two ways:
   through its Python adapter (torch) and as its ONNX codec folder (onnxruntime), at the
   same thread count (target: ONNX decode >= torch decode, ratio >= 1.0);
2. for each way in, a sweep's decode throughput vs a bare loop of decode + argmax over
   the same latents (the sweep's overhead ratio).

    nice -n 15 python benchmarks/bench_onnx.py [--threads 2] [--rounds 5]
"""

from __future__ import annotations

import argparse
import statistics
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

import torch  # noqa: E402

from core.codecs.adapter import load_with_adapter  # noqa: E402
from core.codecs.onnx import load_onnx_codec  # noqa: E402
from core.engine.sweep import SweepSettings, run_sweep  # noqa: E402
from core.engine.text import chunk_text, demo_text  # noqa: E402

SAMPLE = ROOT / "sample_models" / "transformer"
BATCH = 256


def rate(fn, items: int, rounds: int) -> float:
    """Median items per second of `rounds` calls of fn (after one warm-up)."""
    fn()
    times = []
    for _ in range(rounds):
        started = time.perf_counter()
        fn()
        times.append(time.perf_counter() - started)
    return items / statistics.median(times)


def batched(fn, x: torch.Tensor):
    def run():
        for start in range(0, x.shape[0], BATCH):
            fn(x[start : start + BATCH])
    return run


def main(argv=None) -> int:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--threads", type=int, default=2)
    parser.add_argument("--rounds", type=int, default=5)
    args = parser.parse_args(argv)
    torch.set_num_threads(args.threads)  # the ONNX codec's sessions use torch's thread count
    ways = {
        "torch (adapter)": load_with_adapter(SAMPLE / "transformer.pt", str(SAMPLE / "adapter.py")),
        "onnx": load_onnx_codec(SAMPLE / "onnx"),
    }
    chunks = chunk_text(demo_text(), ways["onnx"])
    ids = chunks.ids()
    mean, _ = ways["torch (adapter)"].encode(ids)
    z = mean + 0.1 * torch.randn(mean.shape, generator=torch.Generator().manual_seed(0))
    n = ids.shape[0]
    print(f"transformer sample: {n} chunks of the demo text, batches of {BATCH}, {args.threads} threads, "
          f"median of {args.rounds} rounds")
    found = {}
    for label, codec in ways.items():
        enc = rate(batched(codec.encode, ids), n, args.rounds)
        dec = rate(batched(lambda b: codec.decode(b).argmax(-1), z), n, args.rounds)
        sigmas = (0.0, 0.1, 0.3, 1.0)
        settings = SweepSettings(sigmas=sigmas, repeats=2, noise="isotropic", seed=0)
        sweep = rate(lambda: run_sweep(codec, chunks, settings), n * len(sigmas) * 2, max(1, args.rounds // 2))
        found[label] = (enc, dec, sweep)
        print(f"  {label:16s} encode {enc:9.0f} chunks/s   decode {dec:9.0f} chunks/s   "
              f"sweep {sweep:9.0f} decodes/s   sweep / bare decode {sweep / dec:.2f}")
    (te, td, _), (oe, od, _) = found["torch (adapter)"], found["onnx"]
    print(f"ratio onnx / torch: encode {oe / te:.2f}, decode {od / td:.2f} (target decode >= 1.00)")
    return 0


if __name__ == "__main__":
    raise SystemExit(main())
