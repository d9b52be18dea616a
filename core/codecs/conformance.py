"""One conformance validator for the codec contract: probe a codec on a few real chunks.

Every failure is one sentence: what was expected, what came back. Run on every codec the
project did not build itself (adapters, ONNX) before anything else uses it.
"""

from __future__ import annotations

import numpy as np

from core.codecs.contract import CONTRACT_SIZES
from core.deferred import torch
from core.errors import ChunkscopeError

PROBE_TEXT = (
    "At 06:40 the relief crew signed the logbook, oiled the points at the upper loop, "
    "and noted that the water tank held 1,850 litres."
)
BATCH_TOLERANCE = 1e-4  # a batch decodes like its rows one by one, within this (absolute, on logits)


class CodecContractError(ChunkscopeError):
    """A codec does not meet the contract of DESIGN.md."""


def _shape(x) -> str:
    return "x".join(str(int(d)) for d in x.shape) if hasattr(x, "shape") else type(x).__name__


def probe_ids(codec, chunks: int = 6) -> "torch.Tensor":
    """A few real chunks: the probe text through the codec's tokenizer, then seeded random ids."""
    k, v = int(codec.chunk_size), int(codec.vocab_size)
    try:
        ids = list(codec.tokenizer.encode(PROBE_TEXT, add_special_tokens=False).ids)
    except Exception:
        ids = []
    ids = [i for i in ids if 0 <= i < v][: k * (chunks - 2)]
    ids += [codec.pad_id] * (-len(ids) % k)
    rows = np.asarray(ids, dtype=np.int64).reshape(-1, k) if ids else np.zeros((0, k), dtype=np.int64)
    random_rows = np.random.default_rng(0).integers(0, v, size=(max(2, chunks - len(rows)), k))
    return torch.from_numpy(np.concatenate([rows, random_rows]).astype(np.int64))


def check_codec(codec, name: str = "the codec") -> None:
    """Raise CodecContractError (one sentence) unless `codec` meets the contract.

    Probes: the sizes and flags; the tokenizer's vocabulary; shapes, dtypes and finiteness
    of `encode` and `decode`; std > 0 when variational; determinism (two decodes equal);
    batch independence (a batch decodes like its rows one by one, within 1e-4, which
    catches a model left in training mode).
    """

    def fail(what: str) -> None:
        raise CodecContractError(f"{name} does not meet the codec contract: {what}.")

    for key in CONTRACT_SIZES:
        value = getattr(codec, key, None)
        if not isinstance(value, (int, np.integer)) or isinstance(value, bool):
            fail(f"{key} should be a whole number, but it is {value!r}")
        if value < (0 if key == "pad_id" else 1):
            fail(f"{key} should be {'>= 0' if key == 'pad_id' else '>= 1'}, but it is {value}")
    k, d, v, pad = (int(getattr(codec, key)) for key in CONTRACT_SIZES)
    if pad >= v:
        fail(f"pad_id should lie inside the vocabulary of {v} tokens, but it is {pad}")
    if not isinstance(getattr(codec, "variational", None), (bool, np.bool_)):
        fail(f"variational should be True or False, but it is {getattr(codec, 'variational', None)!r}")
    tokenizer = getattr(codec, "tokenizer", None)
    if tokenizer is None or not callable(getattr(tokenizer, "get_vocab_size", None)):
        fail("tokenizer should be a tokenizers.Tokenizer, but it is missing or is something else")
    if tokenizer.get_vocab_size() != v:
        fail(f"the tokenizer has {tokenizer.get_vocab_size()} tokens, but vocab_size says {v}")
    for method in ("encode", "decode"):
        if not callable(getattr(codec, method, None)):
            fail(f"it has no {method}() method")

    ids = probe_ids(codec)
    n = int(ids.shape[0])
    with torch.inference_mode():
        try:
            out = codec.encode(ids)
        except Exception as exc:
            fail(f"encode() of a LongTensor[{n}, {k}] raised {type(exc).__name__}: {exc}")
        if not isinstance(out, tuple) or len(out) != 2:
            fail(f"encode() should return (mean, std or None), but it returned {type(out).__name__}")
        mean, std = out
        _check_tensor(fail, "encode()'s mean", mean, (n, d))
        if codec.variational:
            if std is None:
                fail("a variational codec's encode() should return a std, but it returned None")
            _check_tensor(fail, "encode()'s std", std, (n, d))
            if not bool((std > 0).all()):
                fail(f"a variational codec's std should be > 0 everywhere, but its smallest value is {float(std.min()):.3g}")
        elif std is not None:
            fail("a plain (not variational) codec's encode() should return None for the std, but it returned a tensor")
        z = mean.float()
        try:
            logits = codec.decode(z)
            again = codec.decode(z)
        except Exception as exc:
            fail(f"decode() of a FloatTensor[{n}, {d}] raised {type(exc).__name__}: {exc}")
        _check_tensor(fail, "decode()'s logits", logits, (n, k, v))
        if not torch.equal(logits, again):
            diff = float((logits.float() - again.float()).abs().max())
            fail(f"two decodes of the same latents should be equal, but they differ by up to {diff:.3g} (is the model in training mode?)")
        rows = torch.cat([codec.decode(z[i : i + 1]) for i in range(n)])
        diff = float((rows.float() - logits.float()).abs().max())
        if not diff <= BATCH_TOLERANCE:
            fail(
                f"a batch should decode like its rows one by one (within {BATCH_TOLERANCE:g}), but they differ by up to "
                f"{diff:.3g} (is the model in training mode, with batch norm?)"
            )


def _check_tensor(fail, what: str, x, shape: tuple[int, ...]) -> None:
    if not isinstance(x, torch.Tensor):
        fail(f"{what} should be a torch tensor, but it is {type(x).__name__}")
    if not x.is_floating_point():
        fail(f"{what} should be floating point, but it is {x.dtype}")
    if tuple(x.shape) != shape:
        want = "x".join(str(s) for s in shape)
        fail(f"{what} should have shape {want}, but it has shape {_shape(x)}")
    if not bool(torch.isfinite(x).all()):
        fail(f"{what} should be finite, but it holds NaN or infinity")
