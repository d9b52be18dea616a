"""Checkpoint round trips and every bad file the loader must name."""

import json
import os
import struct
import subprocess
import sys

import pytest
import torch
from safetensors.torch import save_file

from core.codecs.checkpoint import KEY_CARD, KEY_CONFIG, KEY_FORMAT, KEY_TOKENIZER, Codec, load_codec, save_codec
from core.errors import CheckpointError


def _tensors_and_metadata(codec):
    tensors = {k: v.clone() for k, v in codec.model.state_dict().items()}
    metadata = {
        KEY_FORMAT: "1",
        KEY_CONFIG: json.dumps(codec.config.to_dict()),
        KEY_TOKENIZER: codec.tokenizer.to_str(),
        KEY_CARD: json.dumps({"note": "x"}),
    }
    return tensors, metadata


def test_round_trip_is_bit_identical(small_codec, tmp_path):
    path = tmp_path / "a.safetensors"
    digest = save_codec(small_codec, path)
    loaded = load_codec(path)
    assert loaded.sha256 == digest and len(digest) == 64
    assert loaded.codec.config == small_codec.config
    assert loaded.card == small_codec.card
    assert loaded.tokenizer.to_str() == small_codec.tokenizer.to_str()
    for key, value in small_codec.model.state_dict().items():
        assert torch.equal(loaded.codec.model.state_dict()[key], value), key


def test_half_precision_checkpoints_load(small_codec, tmp_path):
    for dtype in ("float16", "bfloat16"):
        path = tmp_path / f"{dtype}.safetensors"
        save_codec(small_codec, path, dtype=dtype)
        loaded = load_codec(path)
        w = loaded.codec.model.state_dict()["enc_in.weight"]
        assert w.dtype == torch.float32
        assert torch.equal(w, small_codec.model.state_dict()["enc_in.weight"].to(getattr(torch, dtype)).float())


def test_encode_decode_shapes_follow_the_contract(small_codec):
    ids = torch.randint(0, small_codec.vocab_size, (5, small_codec.chunk_size))
    mean, std = small_codec.encode(ids)
    assert mean.shape == (5, small_codec.latent_dim) and std.shape == mean.shape and bool((std > 0).all())
    assert small_codec.decode(mean).shape == (5, small_codec.chunk_size, small_codec.vocab_size)


def _write(path, tensors, metadata):
    save_file(tensors, str(path), metadata=metadata)
    return path


def _expect(path, *words):
    with pytest.raises(CheckpointError) as info:
        load_codec(path)
    message = str(info.value)
    assert path.name in message
    for word in words:
        assert word in message, message
    return message


def test_not_a_safetensors_file(tmp_path):
    path = tmp_path / "notes.safetensors"
    path.write_bytes(b"this is just some text, not tensors at all" * 10)
    _expect(path, "not a safetensors file")


def test_tiny_file(tmp_path):
    path = tmp_path / "tiny.safetensors"
    path.write_bytes(b"abc")
    _expect(path, "not a safetensors file")


def test_pickle_is_refused_without_unpickling(tmp_path, small_codec):
    path = tmp_path / "model.safetensors"
    torch.save(small_codec.model.state_dict(), path)
    _expect(path, "not a safetensors file")


def test_truncated_file(tmp_path, small_codec):
    path = tmp_path / "cut.safetensors"
    save_codec(small_codec, path)
    data = path.read_bytes()
    path.write_bytes(data[: len(data) - 100])
    _expect(path, "truncated")


def test_truncated_header(tmp_path, small_codec):
    path = tmp_path / "cut.safetensors"
    save_codec(small_codec, path)
    data = path.read_bytes()
    (header_len,) = struct.unpack("<Q", data[:8])
    path.write_bytes(data[: 8 + header_len // 2])
    _expect(path, "truncated")


@pytest.mark.parametrize("key", [KEY_FORMAT, KEY_CONFIG, KEY_TOKENIZER])
def test_missing_metadata_key(tmp_path, small_codec, key):
    tensors, metadata = _tensors_and_metadata(small_codec)
    del metadata[key]
    _expect(_write(tmp_path / "m.safetensors", tensors, metadata), "missing", key)


def test_unknown_architecture(tmp_path, small_codec):
    tensors, metadata = _tensors_and_metadata(small_codec)
    config = small_codec.config.to_dict() | {"arch": "transformer-xl-9000"}
    metadata[KEY_CONFIG] = json.dumps(config)
    _expect(_write(tmp_path / "u.safetensors", tensors, metadata), "unknown architecture", "transformer-xl-9000")


def test_newer_format(tmp_path, small_codec):
    tensors, metadata = _tensors_and_metadata(small_codec)
    metadata[KEY_FORMAT] = "7"
    _expect(_write(tmp_path / "n.safetensors", tensors, metadata), "format 7", "newer")


def test_missing_tensor(tmp_path, small_codec):
    tensors, metadata = _tensors_and_metadata(small_codec)
    del tensors["mean_head.weight"]
    _expect(_write(tmp_path / "t.safetensors", tensors, metadata), "missing the tensor", "mean_head.weight")


def test_wrong_shape(tmp_path, small_codec):
    tensors, metadata = _tensors_and_metadata(small_codec)
    tensors["dec_in.weight"] = torch.zeros(3, 3)
    _expect(_write(tmp_path / "s.safetensors", tensors, metadata), "dec_in.weight", "shape")


def test_non_finite_weights(tmp_path, small_codec):
    tensors, metadata = _tensors_and_metadata(small_codec)
    tensors["enc_in.bias"][3] = float("nan")
    _expect(_write(tmp_path / "nan.safetensors", tensors, metadata), "non-finite", "enc_in.bias")


def test_tokenizer_vocabulary_mismatch(tmp_path, small_codec):
    from core.codecs.tokenizer import train_byte_bpe

    tensors, metadata = _tensors_and_metadata(small_codec)
    metadata[KEY_TOKENIZER] = train_byte_bpe(["a different and much smaller corpus"], 270).to_str()
    _expect(_write(tmp_path / "tok.safetensors", tensors, metadata), "tokenizer", "vocabulary")


def test_integer_tensor_is_refused(tmp_path, small_codec):
    tensors, metadata = _tensors_and_metadata(small_codec)
    tensors["output_bias"] = torch.zeros_like(tensors["output_bias"], dtype=torch.int32)
    _expect(_write(tmp_path / "int.safetensors", tensors, metadata), "output_bias", "float32")


def test_missing_file(tmp_path):
    # the whole path the user typed, not only its last part: which folder was looked in matters
    _expect(tmp_path / "nowhere.safetensors", str(tmp_path / "nowhere.safetensors"), "does not exist")


def test_header_info_is_read_without_the_weights(tmp_path, small_codec):
    from core.codecs.checkpoint import read_checkpoint_info

    path = tmp_path / "h.safetensors"
    save_codec(Codec(small_codec.model, small_codec.tokenizer, card={"note": "header"}), path)
    info = read_checkpoint_info(path)
    assert info.config == load_codec(path).codec.config
    assert info.card == {"note": "header"}
    # the same sentences as load_codec for a bad header
    tensors, metadata = _tensors_and_metadata(small_codec)
    metadata[KEY_FORMAT] = "9"
    bad = _write(tmp_path / "newer.safetensors", tensors, metadata)
    with pytest.raises(CheckpointError) as header_error:
        read_checkpoint_info(bad)
    assert str(header_error.value) == _expect(bad, "format 9")


def test_core_and_the_window_import_without_torch():
    # torch (about 2.5 s to import) loads in the first background task, after the window is up
    code = ("import sys, core, core.codecs.checkpoint, core.engine.sweep, core.analyses.views, app.window, app.main; "
            "print('torch' in sys.modules)")
    out = subprocess.run([sys.executable, "-c", code], capture_output=True, text=True, check=True,
                         env={**os.environ, "QT_QPA_PLATFORM": "offscreen"})
    assert out.stdout.strip() == "False", out.stderr
