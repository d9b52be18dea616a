"""Worst-case speed, printed as ratios to its targets (run by hand; never part of the tests).

The demo text's chunks on the tolerant sample: wall time of `worst_case` (target: under a
minute on 2 cores) and the search's decoder calls per chunk, forward + backward (target: at
most 20 on average), with the random radius's sweep decodes beside them.

    nice python benchmarks/bench_worstcase.py [--checkpoint sample_models/tolerant.safetensors] [--threads 2]
"""

from __future__ import annotations

import argparse
import sys
import time
from pathlib import Path

ROOT = Path(__file__).resolve().parent.parent
sys.path.insert(0, str(ROOT))

import torch  # noqa: E402

from core.analyses.worstcase import WorstCaseSettings, worst_case  # noqa: E402
from core.codecs.open import open_checkpoint  # noqa: E402
from core.engine.noise import encode_chunks  # noqa: E402
from core.engine.text import chunk_text, demo_text  # noqa: E402

TIME_TARGET_S = 60.0
CALLS_TARGET = 20.0


def main() -> None:
    parser = argparse.ArgumentParser(description=__doc__.splitlines()[0])
    parser.add_argument("--checkpoint", default=str(ROOT / "sample_models" / "tolerant.safetensors"))
    parser.add_argument("--threads", type=int, default=2)
    args = parser.parse_args()
    torch.set_num_threads(args.threads)
    codec = open_checkpoint(args.checkpoint)
    chunks = chunk_text(demo_text(), codec, "demo text")
    started = time.perf_counter()
    result = worst_case(codec, chunks, WorstCaseSettings())
    total = time.perf_counter() - started

    # the search alone: the same run with a one-sigma grid, so the random sweep costs almost nothing
    encoded = encode_chunks(codec, chunks)
    started = time.perf_counter()
    worst_case(codec, chunks, WorstCaseSettings(sigmas=(1e-6,), repeats=1), encoded=encoded)
    search = time.perf_counter() - started

    s = result.summary()
    print(f"{codec.name}: {s['chunks']:,} chunks, {args.threads} threads")
    print(f"  wall time          {total:6.1f} s   ratio to the {TIME_TARGET_S:.0f} s target {total / TIME_TARGET_S:.2f}")
    print(f"    search alone     {search:6.1f} s   ({search / total:.0%} of the run; the rest is the random radius's sweep)")
    print(f"  search calls/chunk {s['calls_per_chunk']:6.2f}     ratio to the {CALLS_TARGET:.0f}-call target "
          f"{s['calls_per_chunk'] / CALLS_TARGET:.2f} (forward {s['forward_calls_per_chunk']:.2f}, "
          f"backward {s['backward_calls_per_chunk']:.2f})")
    print(f"  random-radius decodes/chunk {s['random_calls_per_chunk']:.1f}")
    print(f"  verified {s['verified']:,}, failed {s['failed']:,}; worst case below random for {s['below_random']:,} of "
          f"{s['compared']:,} ({100 * (s['below_random_rate'] or 0):.1f} %); median radius / random radius "
          f"{s['radius_over_random_median']:.3f}")


if __name__ == "__main__":
    main()
