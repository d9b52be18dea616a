"""The Generator errors view: opened from a predictions file, it shows core's numbers and verdict and colours
the text where the decode is wrong; a file for another codec is one sentence in the message bar."""

from __future__ import annotations

from pathlib import Path

import torch

from core.analyses.predictions import write_predictions, wrong_levels
from core.engine.noise import encode_chunks
from core.engine.text import chunk_text, demo_text

WAIT = 300_000


def _predictions(window, tmp_path, sha=None) -> Path:
    entry = next(e for e in window.workbench.entries.values() if e.name == "tolerant")
    codec = entry.codec
    text = demo_text()[:3000]
    chunks = chunk_text(text, codec)
    mean = encode_chunks(codec, chunks).mean
    eps = torch.randn(len(mean), 2, mean.shape[1], generator=torch.Generator().manual_seed(1))
    path = tmp_path / "p.safetensors"
    write_predictions(path, (mean.unsqueeze(1) + 0.8 * mean.square().mean(0).sqrt() * eps).numpy(),
                      chunks.ids().numpy(), sha or codec.sha256, "view test", text=text)
    return path


def test_view_shows_cores_numbers_and_the_wrong_tokens(qtbot, window, tmp_path):
    qtbot.waitUntil(lambda: window.workbench.entries and all(e.codec is not None for e in window.workbench.entries.values()),
                    timeout=WAIT)
    path = _predictions(window, tmp_path)
    window.open_predictions(str(path))
    assert window.current_view() == "predictions"
    panel = window.predictions
    qtbot.waitUntil(lambda: panel.result is not None and not panel.is_running(), timeout=WAIT)
    s = panel.result.summary
    assert panel.boxes["sigma"][0].text() == f"{s['effective_sigma']:.3g}"
    assert panel.boxes["accuracy"][0].text() == f"{100 * s['decoded_accuracy']:.2f} %"
    assert panel.verdict.text().lower() == panel.result.verdict.lower()
    assert panel.text.shown_text() == panel.result.chunks.text
    assert (wrong_levels(panel.result) > 0).any()  # there is something to colour
    assert window.workbench.entry().name == "tolerant"


def test_predictions_for_another_codec_are_one_sentence(qtbot, window, tmp_path):
    qtbot.waitUntil(lambda: window.workbench.entries and all(e.codec is not None for e in window.workbench.entries.values()),
                    timeout=WAIT)
    path = _predictions(window, tmp_path, sha="f" * 64)
    window.open_predictions(str(path))
    qtbot.waitUntil(lambda: bool(window.message.text()), timeout=WAIT)
    assert str(path) in window.message.text() and "no open checkpoint has it" in window.message.text()
