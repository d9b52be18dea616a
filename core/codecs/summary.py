"""What a researcher asks of a model first, as rows of (label, text), for `info` and the details pane.

Built from the contract, the codec's own `describe()` (only when it offers one) and its
card; nothing here assumes the built-in architecture. Machine paths in a card are not
facts of the model and are left out of the rows.
"""

from __future__ import annotations

import json
import os
from typing import Any, Mapping

Row = tuple[str, str]

_REGULARISERS = (
    ("kl_weight", "KL {:g}"),
    ("free_bits", "free bits {:g}"),
    ("latent_dropout", "latent dropout {:g}"),
    ("token_mask_prob", "input masking {:g}"),
)


def _pct(x: float) -> str:
    return f"{x * 100:.3f} %"


def training_line(card: Mapping[str, Any]) -> str:
    """How it was trained, in one line, from a card's recipe (our recipe's keys; others: nothing)."""
    recipe = card.get("recipe")
    if not isinstance(recipe, Mapping):
        return ""
    parts = ["variational" if recipe.get("variational") else "plain"]
    parts += [fmt.format(recipe[key]) for key, fmt in _REGULARISERS if isinstance(recipe.get(key), (int, float)) and recipe[key]]
    steps = recipe.get("steps")
    if isinstance(steps, int):
        parts.append(f"{steps:,} steps")
    if isinstance(recipe.get("batch_size"), int):
        parts.append(f"batch {recipe['batch_size']}")
    return ", ".join(parts)


def _training_rows(card: Mapping[str, Any]) -> list[Row]:
    """How it was trained in one line, then the step it was saved at when that is not the recipe's end."""
    rows: list[Row] = []
    trained = training_line(card)
    if trained:
        rows.append(("trained", trained))
    step = card.get("step", card.get("steps_done"))
    recipe = card.get("recipe") if isinstance(card.get("recipe"), Mapping) else {}
    if isinstance(step, int) and not isinstance(step, bool) and step != recipe.get("steps"):
        of = f" of {recipe['steps']:,}" if isinstance(recipe.get("steps"), int) else ""
        rows.append(("saved at step", f"{step:,}{of}"))
    if isinstance(card.get("training_loss"), (int, float)):
        rows.append(("training loss", f"{card['training_loss']:.4g}"))
    return rows


def measured_rows(card: Mapping[str, Any]) -> list[Row]:
    """What the card says was measured: σ = 0 accuracy and the 99 % tolerances, when present."""
    measured = card.get("measured")
    if not isinstance(measured, Mapping):
        return []
    rows: list[Row] = []
    for key, label in (("held_out", "held-out σ = 0"), ("demo", "demo σ = 0")):
        part = measured.get(key)
        if isinstance(part, Mapping) and isinstance(part.get("token_accuracy_sigma0"), (int, float)):
            tokens = part.get("tokens")
            on = f" ({tokens:,})" if isinstance(tokens, int) else ""
            rows.append((label, f"{_pct(part['token_accuracy_sigma0'])} of tokens right{on}"))
    outside = measured.get("outside", {}).get("texts") if isinstance(measured.get("outside"), Mapping) else None
    if isinstance(outside, list):
        parts = [f"{_pct(t['token_accuracy_sigma0'])} {t.get('label', '?')}" for t in outside
                 if isinstance(t, Mapping) and isinstance(t.get("token_accuracy_sigma0"), (int, float))]
        if parts:
            rows.append(("outside prose σ = 0", " · ".join(parts)))
    tolerance = measured.get("tolerance")
    if isinstance(tolerance, Mapping):
        for noise, unit in (("data-scale", "relative σ"), ("isotropic", "absolute σ")):
            level = tolerance.get(noise, {}).get("0.99") if isinstance(tolerance.get(noise), Mapping) else None
            if isinstance(level, Mapping) and isinstance(level.get("sigma"), (int, float)):
                rows.append((f"99 % at {noise}", f"σ {level['sigma']:.3g} ({unit.split()[0]})"))
    if isinstance(measured.get("latent_rms"), (int, float)):
        rows.append(("latent RMS (card)", f"{measured['latent_rms']:.4g}"))
    return rows


def codec_rows(codec) -> list[Row]:
    """The first rows: architecture and sizes, training, what it reconstructs, then where it came from."""
    arch = dict(codec.architecture())
    kind = "variational" if codec.variational else "plain"
    name = arch.pop("architecture", None)
    rows: list[Row] = [("architecture", f"{name}, {kind} autoencoder" if name else f"{kind} autoencoder")]
    rows.append(("sizes", f"chunk K {codec.chunk_size} · latent D {codec.latent_dim} · vocabulary {codec.vocab_size:,} · pad id {codec.pad_id}"))
    for key, value in arch.items():
        if key == "embed / width / depth" and isinstance(value, str) and value.count(" / ") == 2:
            embed, width, depth = value.split(" / ")  # a short key leaves the value room in a narrow pane
            rows.append(("layers", f"embed {embed} · width {width} · depth {depth}"))
            continue
        rows.append((str(key), f"{value:,}" if isinstance(value, int) and not isinstance(value, bool) else str(value)))
    rows += _training_rows(codec.card)
    rows += measured_rows(codec.card)
    rows.append(("opened as", codec.source.opened_as + (f" ({os.path.basename(codec.source.adapter)})" if codec.source.adapter else "")))
    if codec.path:
        rows.append(("file", os.path.basename(codec.path.rstrip("/")) or codec.path))
    rows.append(("sha256", codec.sha256 or "(not from a file)"))
    if codec.source.adapter_sha256:
        rows.append(("adapter sha256", codec.source.adapter_sha256))
    return rows


def _looks_like_machine_path(key: str, value: Any) -> bool:
    return isinstance(value, str) and (key.endswith("path") or key.endswith("_dir")) and (os.sep in value or "/" in value)


def card_rows(card: Mapping[str, Any], prefix: str = "", limit: int = 80) -> list[Row]:
    """The whole card, flattened to dotted keys, without machine paths."""
    rows: list[Row] = []
    for key, value in card.items():
        name = f"{prefix}{key}"
        if len(rows) >= limit:
            break
        if _looks_like_machine_path(str(key), value):
            continue
        if isinstance(value, Mapping):
            rows.extend(card_rows(value, name + ".", limit - len(rows)))
        elif isinstance(value, list) and value and all(isinstance(v, Mapping) for v in value):
            for index, item in enumerate(value):
                if len(rows) >= limit:
                    break
                rows.extend(card_rows(item, f"{name}[{index}].", limit - len(rows)))
        elif isinstance(value, float):
            rows.append((name, f"{value:.4g}"))
        elif isinstance(value, list):
            rows.append((name, json.dumps(value)))
        else:
            rows.append((name, str(value)))
    return rows


def header_rows(info) -> list[Row]:
    """The same first rows from a built-in checkpoint's header, before its weights are loaded."""
    c = info.config
    rows: list[Row] = [
        ("architecture", f"{c.arch}, {'variational' if c.variational else 'plain'} autoencoder"),
        ("sizes", f"chunk K {c.chunk_size} · latent D {c.latent_dim} · vocabulary {c.vocab_size:,} · pad id {c.pad_id}"),
        ("layers", f"embed {c.embed_dim} · width {c.width} · depth {c.depth}"),
        ("parameters", "loading weights…"),
    ]
    rows += _training_rows(info.card)
    rows += measured_rows(info.card)
    rows += [("opened as", "built-in"), ("file", info.path.name), ("sha256", "loading weights…")]
    return rows


def short_summary(codec=None, info=None) -> str:
    """One line for a list of checkpoints: kind, K, D and the start of the sha256."""
    source = codec if codec is not None else info.config
    kind = "variational" if source.variational else "plain"
    last = codec.sha256[:8] if codec is not None and codec.sha256 else ("loading weights…" if codec is None else codec.source.opened_as)
    return f"{kind} · K {source.chunk_size} · D {source.latent_dim} · {last}"
