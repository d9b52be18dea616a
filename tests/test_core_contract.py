"""The codec contract (core.codecs.contract) and its one conformance validator.

Each probe of `check_codec` gets a codec broken in exactly that way, and must answer with
one sentence naming what was expected and what came back.
"""

from __future__ import annotations

import pytest
import torch

from conftest import FIXTURE_TEXT, LookupCodec
from core.codecs.conformance import CodecContractError, check_codec
from core.codecs.contract import ChunkCodec, CodecSource, GradientsUnavailable, OpenedCodec, opened
from core.engine.sweep import SweepSettings, run_sweep
from core.engine.text import chunk_text


def one_sentence(message: str) -> bool:
    return message.endswith(".") and "\n" not in message and message.count(". ") == 0


def refused(codec, *words: str) -> str:
    with pytest.raises(CodecContractError) as caught:
        check_codec(codec, "mine.py")
    message = str(caught.value)
    assert message.startswith("mine.py does not meet the codec contract: ") and one_sentence(message), message
    for word in words:
        assert word in message, (word, message)
    return message


def test_the_contract_only_codec_and_the_builtin_pass(tokenizer, small_codec):
    lookup = LookupCodec(tokenizer)
    assert isinstance(lookup, ChunkCodec) and isinstance(small_codec, ChunkCodec)
    check_codec(lookup)
    check_codec(small_codec)
    check_codec(opened(small_codec))


class Dropping(LookupCodec):
    """Left in training mode: dropout on the decoder's input."""

    def decode(self, z):
        return super().decode(torch.nn.functional.dropout(z, 0.5, training=True))


class BatchNormed(LookupCodec):
    """Deterministic, but each row depends on the others (batch statistics, as batch norm in training mode)."""

    def decode(self, z):
        return super().decode((z - z.mean(0)) / (z.std(0) + 1e-3) if z.shape[0] > 1 else z)


class Shaped(LookupCodec):
    def __init__(self, tokenizer, extra: int = 1):
        super().__init__(tokenizer)
        self.extra = extra

    def decode(self, z):
        logits = super().decode(z)
        return torch.cat([logits, logits[..., : self.extra]], -1)


def test_model_left_in_training_mode_is_caught(tokenizer):
    refused(Dropping(tokenizer), "two decodes", "training mode")
    refused(BatchNormed(tokenizer), "batch should decode like its rows", "within 0.0001")


def test_shapes_sizes_and_vocabulary(tokenizer):
    v = tokenizer.get_vocab_size()
    refused(Shaped(tokenizer), "decode()'s logits should have shape", f"x4x{v}, but it has shape", f"x4x{v + 1}")
    codec = LookupCodec(tokenizer)
    codec.vocab_size = v + 3
    refused(codec, f"the tokenizer has {v} tokens, but vocab_size says {v + 3}")
    codec = LookupCodec(tokenizer)
    codec.pad_id = v
    refused(codec, "pad_id should lie inside the vocabulary")
    codec = LookupCodec(tokenizer)
    codec.latent_dim = 5
    refused(codec, "encode()'s mean should have shape", "x5", "x12")
    codec = LookupCodec(tokenizer)
    codec.chunk_size = "4"
    refused(codec, "chunk_size should be a whole number", "'4'")


def test_posterior_and_finiteness(tokenizer):
    class NoStd(LookupCodec):
        variational = True

    codec = NoStd(tokenizer)
    codec.variational = True
    refused(codec, "variational codec's encode() should return a std")

    class ZeroStd(LookupCodec):
        def encode(self, ids):
            mean, _ = super().encode(ids)
            return mean, torch.zeros_like(mean)

    codec = ZeroStd(tokenizer)
    codec.variational = True
    refused(codec, "std should be > 0 everywhere", "0")
    refused(ZeroStd(tokenizer), "plain (not variational)", "None for the std")

    class NaNs(LookupCodec):
        def decode(self, z):
            out = super().decode(z)
            out[0, 0, 0] = float("nan")
            return out

    refused(NaNs(tokenizer), "logits should be finite")

    class Raising(LookupCodec):
        def encode(self, ids):
            raise RuntimeError("CUDA is not available")

    refused(Raising(tokenizer), "encode() of a LongTensor", "RuntimeError: CUDA is not available")

    class Ints(LookupCodec):
        def decode(self, z):
            return super().decode(z).long()

    refused(Ints(tokenizer), "logits should be floating point", "torch.int64")


def test_decode_with_gradients_and_inference_elsewhere(small_codec):
    codec = opened(small_codec)
    z = torch.randn(3, codec.latent_dim, requires_grad=True)
    logits = codec.decode_with_grad(z)
    (grad,) = torch.autograd.grad(logits[:, 0, 5].sum(), z)
    assert grad.shape == z.shape and bool(grad.abs().sum() > 0)
    assert not codec.decode(z.detach()).requires_grad  # the sweep and views decode under inference mode

    class NoGrad(LookupCodec):
        supports_gradients = False

    with pytest.raises(GradientsUnavailable) as caught:
        opened(NoGrad(small_codec.tokenizer)).decode_with_grad(z)
    assert one_sentence(str(caught.value))


def test_a_contract_only_codec_sweeps_with_its_origin_in_the_provenance(tokenizer):
    codec = OpenedCodec(LookupCodec(tokenizer), CodecSource(path="/runs/x.pt", sha256="cd" * 32, opened_as="adapter",
                                                            adapter="/home/me/my_codec.py", adapter_sha256="ef" * 32))
    result = run_sweep(codec, chunk_text(FIXTURE_TEXT, codec), SweepSettings(sigmas=(0.0, 1.0), repeats=1))
    prov = result.provenance["codec"]
    assert prov["opened_as"] == "adapter" and prov["sha256"] == "cd" * 32 and prov["adapter_sha256"] == "ef" * 32
    assert prov["config"]["chunk_size"] == 4 and prov["config"]["architecture"] == {}
    assert result.curves[0].token_accuracy == 1.0  # the lookup codec reconstructs exactly at sigma 0
