"""The training recipe: a seconds-long run gives a loadable checkpoint with a full card, reproducibly."""

from __future__ import annotations

import argparse
import math
from dataclasses import replace

import pytest
import torch

from conftest import documented_held_out, stdlib_corpus_files
from core.codecs.checkpoint import load_codec
from core.training.corpus import Corpus, CorpusInfo, file_text, is_held_out
from core.codecs.tokenizer import train_byte_bpe
from core.training.train import RECIPES, Recipe, add_arguments, train

TEXTS = [
    "Return the sum of two numbers.\nRaise ValueError when the input is empty.\n",
    "Open the file and read its lines; the caller closes it.\n",
    "A tiny helper that formats a date as an ISO string.\n",
    "Cache the result so the next call is fast.\n",
] * 6


def tiny_corpus() -> Corpus:
    info = CorpusInfo(
        python_version="test", stdlib_path="", rule="test texts", split_rule="last text held out",
        train_files=len(TEXTS) - 1, held_out_files=1, train_characters=sum(map(len, TEXTS[:-1])),
        held_out_characters=len(TEXTS[-1]), train_sha256="0" * 64, held_out_sha256="1" * 64,
    )
    return Corpus(train=TEXTS[:-1], held_out=TEXTS[-1:] * 4, info=info)


TINY = Recipe(
    name="tiny", vocab_size=300, latent_dim=8, embed_dim=16, width=32, depth=1, variational=True,
    kl_weight=0.01, free_bits=0.1, latent_dropout=0.1, token_mask_prob=0.1, steps=30, batch_size=32,
    warmup_steps=5, log_every=10, save_dtype="float32", why="a test run",
)


@pytest.fixture(scope="module")
def shared():
    corpus = tiny_corpus()
    return corpus, train_byte_bpe(corpus.train, TINY.vocab_size)


def test_short_run_gives_loadable_checkpoint_with_full_card(tmp_path, shared):
    corpus, tokenizer = shared
    lines: list[str] = []
    path = tmp_path / "tiny.safetensors"
    train(TINY, path, log=lines.append, corpus=corpus, tokenizer=tokenizer)
    codec = load_codec(path)
    card = codec.card
    assert card["recipe"] == TINY.to_dict()
    assert card["steps_done"] == TINY.steps
    assert card["tokenizer"]["vocab_size"] == TINY.vocab_size
    assert set(card["versions"]) >= {"python", "torch", "tokenizers"}
    assert card["corpus"]["train_sha256"] == corpus.info.train_sha256
    assert card["train_wall_seconds"] > 0 and card["why"]
    measured = card["measured"]
    for text in ("held_out", "demo"):
        assert 0.0 <= measured[text]["token_accuracy_sigma0"] <= 1.0
    for noise in ("isotropic", "data-scale"):
        assert set(measured["tolerance"][noise]) == {"0.999", "0.99", "0.9"}
    assert measured["latent_rms"] > 0
    assert codec.codec.config.latent_dim == TINY.latent_dim and codec.variational
    assert any("step" in line and "loss" in line for line in lines)


def test_same_seed_gives_bit_identical_weights(tmp_path, shared):
    corpus, tokenizer = shared
    recipe = replace(TINY, steps=12)
    a = train(recipe, tmp_path / "a.safetensors", log=lambda _: None, corpus=corpus, tokenizer=tokenizer, measure_card=False)
    b = train(recipe, tmp_path / "b.safetensors", log=lambda _: None, corpus=corpus, tokenizer=tokenizer, measure_card=False)
    c = train(replace(recipe, seed=1), tmp_path / "c.safetensors", log=lambda _: None, corpus=corpus,
              tokenizer=tokenizer, measure_card=False)
    sa, sb, sc = (x.model.state_dict() for x in (a, b, c))
    assert all(torch.equal(sa[k], sb[k]) for k in sa)
    assert not all(torch.equal(sa[k], sc[k]) for k in sa)


def test_tokenizer_training_is_deterministic(shared):
    corpus, tokenizer = shared
    assert train_byte_bpe(corpus.train, TINY.vocab_size).to_str() == tokenizer.to_str()


def test_corpus_extracts_docstrings_and_comments_only():
    source = '"""Module doc."""\nimport os  # why os\n\ndef f():\n    """Function doc."""\n    return "not a doc"\n'
    assert file_text(source) == "Module doc.\nFunction doc.\nwhy os\n"


def test_the_split_follows_the_documented_hash_rule():
    # known answers, computed once with hashlib in a shell: the digest of "email/parser.py" is 0 mod 10,
    # those of "json/decoder.py" and "os.py" are 3
    assert is_held_out("email/parser.py") and not is_held_out("json/decoder.py") and not is_held_out("os.py")
    names = [f"pkg{i}/mod{i}.py" for i in range(400)] + ["json/decoder.py", "email/parser.py", "os.py", "a.py"]
    held = [name for name in names if is_held_out(name)]
    assert held == [name for name in names if documented_held_out(name)]
    assert 0 < len(held) < len(names)  # both sides of the split occur, so the comparison can fail


def test_the_split_of_this_standard_library_holds_out_about_a_tenth():
    # every stdlib path the corpus walks: the hash rule agrees with the docstring's, and a uniform hash
    # mod 10 holds out Binomial(n, 0.1) files: within 4 standard deviations of n / 10 (common practice)
    root, files = stdlib_corpus_files()
    paths = [p.relative_to(root).as_posix() for p in files]
    assert len(paths) > 200
    held = [p for p in paths if is_held_out(p)]
    assert held == [p for p in paths if documented_held_out(p)]
    n = len(paths)
    assert abs(len(held) - n / 10) <= 4 * math.sqrt(n * 0.1 * 0.9)


def test_cli_arguments_parse():
    parser = argparse.ArgumentParser()
    add_arguments(parser)
    args = parser.parse_args(["--recipe", "plain", "--out", "x.safetensors", "--steps", "5", "--seed", "3"])
    assert args.recipe == "plain" and args.steps == 5 and args.seed == 3
    assert set(RECIPES) >= {"plain", "tolerant"}


def test_a_run_keeps_checkpoints_on_a_doubling_schedule_with_step_and_loss(tmp_path, shared):
    corpus, tokenizer = shared
    recipe = replace(TINY, steps=30, first_checkpoint=5)
    # the schedule: 5, 10, 20 (doublings below the end), then the final step (common practice for run logs)
    from core.training.train import checkpoint_steps

    assert checkpoint_steps(recipe) == [5, 10, 20, 30]
    assert checkpoint_steps(TINY) == []
    final = train(recipe, tmp_path / "tiny.safetensors", log=lambda _: None, corpus=corpus, tokenizer=tokenizer,
                  measure_card=False)
    kept = sorted((tmp_path / "tiny-run").glob("*.safetensors"))
    assert [p.name for p in kept] == ["step_00005.safetensors", "step_00010.safetensors", "step_00020.safetensors",
                                      "step_00030.safetensors"]
    cards = [load_codec(p).card for p in kept]
    assert [c["step"] for c in cards] == [5, 10, 20, 30]
    assert all(math.isfinite(c["training_loss"]) and c["training_loss"] > 0 for c in cards)
    # the last kept checkpoint is the final model's weights
    last, ref = load_codec(kept[-1]).codec.model.state_dict(), final.model.state_dict()
    assert all(torch.equal(last[k], ref[k]) for k in ref)


def test_the_character_table_names_each_character_by_unicodedata():
    # each line is a character and its Unicode name (the Unicode Character Database via unicodedata,
    # Python's standard library), lower-cased; only characters that have a name are listed
    import unicodedata

    from core.training.corpus import CHARACTER_RANGES, character_table

    lines = character_table().splitlines()
    expected = [chr(c) for low, high in CHARACTER_RANGES for c in range(low, high + 1) if unicodedata.name(chr(c), "")]
    assert [line.split(" ", 1)[0] for line in lines] == expected
    assert all(line.split(" ", 1)[1] == unicodedata.name(line[0]).lower() for line in lines)
    assert "é latin small letter e with acute" in lines and "€ euro sign" in lines  # from memory: their Unicode names


def test_the_table_is_written_between_the_readme_markers_only(tmp_path, shared):
    from core.training.train import TABLE_BEGIN, TABLE_END, card_table, write_table_into_readme

    corpus, tokenizer = shared
    train(replace(TINY, steps=5), tmp_path / "tiny.safetensors", log=lambda _: None, corpus=corpus, tokenizer=tokenizer)
    readme = tmp_path / "README.md"
    readme.write_text(f"# head\n{TABLE_BEGIN}\nold table\n{TABLE_END}\ntail\n", encoding="utf-8")
    write_table_into_readme(tmp_path)
    text = readme.read_text(encoding="utf-8")
    assert text.startswith(f"# head\n{TABLE_BEGIN}\n") and text.endswith(f"{TABLE_END}\ntail\n")
    assert "old table" not in text and card_table(tmp_path) in text and "`tiny`" in text
    readme.write_text("no markers\n", encoding="utf-8")
    with pytest.raises(ValueError, match="no table markers"):
        write_table_into_readme(tmp_path)
    assert readme.read_text(encoding="utf-8") == "no markers\n"


@pytest.mark.parametrize("case", ["missing folder", "no checkpoints", "no readme"])
def test_the_table_command_says_in_one_sentence_what_is_wrong(tmp_path, case, capsys):
    from core.cli import main

    folder = tmp_path / "models"
    if case != "missing folder":
        folder.mkdir()
    if case == "no readme":
        (folder / "x.safetensors").write_bytes(b"")
    args = ["train", "--table", str(folder)] + (["--readme"] if case == "no readme" else [])
    assert main(args) == 2
    err = capsys.readouterr().err
    assert err.startswith("chunkscope: ") and err.count("\n") == 1 and "Traceback" not in err


def test_outside_texts_are_measured_only_when_present(tmp_path, monkeypatch, shared):
    import core.training.train as train_module

    corpus, tokenizer = shared
    prose = tmp_path / "prose.txt"
    prose.write_text("Cache the result so the next call is fast.\n" * 20, encoding="utf-8")
    monkeypatch.setattr(train_module, "OUTSIDE_TEXTS", (("here", str(prose)), ("absent", str(tmp_path / "nothing.txt"))))
    found = train_module.outside_texts("")
    assert [label for label, _, _ in found] == ["here"]
    codec = train(replace(TINY, steps=5), tmp_path / "tiny.safetensors", log=lambda _: None, corpus=corpus, tokenizer=tokenizer)
    # the tiny corpus has no stdlib path: the card's outside texts are measured from OUTSIDE_TEXTS as found
    texts = codec.card["measured"]["outside"]["texts"]
    assert [t["label"] for t in texts] == ["here"] and texts[0]["tokens"] > 0
    assert 0.0 <= texts[0]["token_accuracy_sigma0"] <= 1.0 and set(texts[0]["tolerance_data_scale"]) == {"0.999", "0.99", "0.9"}
