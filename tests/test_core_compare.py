"""Comparison, training-run trend, report and workspace."""

import json
from html.parser import HTMLParser

import numpy as np
import pytest
import torch

from conftest import LookupCodec
from core.codecs.contract import CodecSource, OpenedCodec
from core.codecs.checkpoint import Codec, save_codec
from core.analyses.compare import character_correctness, compare_codecs, mcnemar, paired_comparison, read_comparison, scale_warning
from core.errors import ChunkscopeError
from core.codecs.model import ChunkMLPConfig, build_model
from core.outputs.report import build_report
from core.engine.sweep import SweepSettings, run_sweep
from core.engine.text import chunk_text
from core.codecs.tokenizer import train_byte_bpe
from core.analyses.trend import step_from_name, trend
from core.outputs.workspace import Workspace, load_workspace, save_workspace

GRID = (0.0, 0.2, 0.4, 0.8, 1.2)


@pytest.mark.parametrize("b,c", [(0, 0), (1, 0), (3, 9), (12, 11), (5, 19)])
def test_mcnemar_exact_matches_statsmodels(b, c):
    # reference: statsmodels.stats.contingency_tables.mcnemar(exact=True)
    from statsmodels.stats.contingency_tables import mcnemar as sm_mcnemar

    ref = sm_mcnemar([[40, b], [c, 30]], exact=True)
    ours = mcnemar(b, c, exact=True)
    assert ours.pvalue == pytest.approx(ref.pvalue, rel=1e-9, abs=1e-12)
    assert ours.statistic == ref.statistic


@pytest.mark.parametrize("b,c", [(30, 12), (100, 140), (25, 25), (400, 330)])
@pytest.mark.parametrize("correction", [True, False])
def test_mcnemar_chi_square_matches_statsmodels(b, c, correction):
    # reference: statsmodels.stats.contingency_tables.mcnemar(exact=False, correction=...)
    from statsmodels.stats.contingency_tables import mcnemar as sm_mcnemar

    ref = sm_mcnemar([[40, b], [c, 30]], exact=False, correction=correction)
    ours = mcnemar(b, c, exact=False, correction=correction)
    assert ours.statistic == pytest.approx(ref.statistic, rel=1e-12)
    assert ours.pvalue == pytest.approx(ref.pvalue, rel=1e-9)


def test_mcnemar_switches_to_chi_square_at_25_discordant():
    # common practice: the exact binomial form for fewer than 25 discordant pairs
    assert mcnemar(10, 14).method == "exact"
    assert mcnemar(10, 15).method == "chi-square"


def test_character_correctness_worked_example():
    # tokens "ab" | "" (first byte of é) | "é" | "c": the partial token's failure spoils é
    spans = np.array([[0, 2], [2, 2], [2, 3], [3, 4]])
    assert character_correctness(4, spans, np.array([True, True, True, False])).tolist() == [True, True, True, False]
    assert character_correctness(4, spans, np.array([True, False, True, True])).tolist() == [True, True, False, True]
    assert character_correctness(4, spans, np.array([False, True, True, True])).tolist() == [False, False, True, True]


class TwoTokenizers:
    text = "Tuesday 14:10 — the railcar Ödön reached Kesselbach with 23 passengers; café receipts €61.20.\n" * 6


def test_different_tokenizers_compare_on_characters_and_self_compare_differs_nowhere(tokenizer):
    other_tok = train_byte_bpe(["completely different words about boilers, bells and bridges " * 5], 280)
    a, b = LookupCodec(tokenizer), LookupCodec(other_tok, seed=5)
    b.name = "other"
    text = TwoTokenizers.text
    settings = SweepSettings(sigmas=GRID, repeats=1, noise="isotropic")
    ra, rb = run_sweep(a, chunk_text(text, a), settings), run_sweep(b, chunk_text(text, b), settings)
    assert ra.chunks.num_tokens != rb.chunks.num_tokens
    pair = paired_comparison(ra, rb)
    assert pair.unit == "character" and all(r.units == len(text) for r in pair.rows)
    assert pair.rows[0].a_only == pair.rows[0].b_only == 0  # both perfect at sigma 0
    same = paired_comparison(ra, ra)
    assert same.unit == "token"
    assert all(r.a_only == 0 and r.b_only == 0 and r.pvalue == 1.0 and r.difference == 0 for r in same.rows)


def test_scale_warning_at_one_and_a_half():
    # DESIGN.md "Scale matters": warn when two latent scales differ by more than 1.5x
    assert scale_warning(["a", "b"], [1.0, 1.49]) is None
    message = scale_warning(["a", "b"], [1.0, 1.6])
    assert message and "1.60x" in message and "b" in message


def test_compare_codecs_end_to_end_and_write_read(tokenizer, tmp_path):
    a = LookupCodec(tokenizer, sharpness=20.0)
    b = LookupCodec(tokenizer, sharpness=20.0, scale=2.0)
    b.name = "wide"
    comparison = compare_codecs([a, b], TwoTokenizers.text, sigmas=GRID, repeats=2, seed=3)
    assert comparison.scale_warning is not None and "2.00x" in comparison.scale_warning
    iso_a, iso_b = comparison.tolerances[0].absolute, comparison.tolerances[1].absolute
    ds_a, ds_b = comparison.tolerances[0].data_scale, comparison.tolerances[1].data_scale
    assert [t.sigma for t in ds_a] == pytest.approx([t.sigma for t in ds_b], rel=1e-6)  # same model, rescaled
    assert iso_b[1].sigma > iso_a[1].sigma  # the larger latent looks more tolerant in absolute sigma
    assert comparison.paired[0].unit == "token"
    out = comparison.write(tmp_path / "cmp")
    again = read_comparison(out)
    assert again.tolerances == comparison.tolerances
    assert [r.pvalue for r in again.paired[0].rows] == [r.pvalue for r in comparison.paired[0].rows]


def _save_small(tokenizer, path, seed):
    torch.manual_seed(seed)
    config = ChunkMLPConfig(chunk_size=4, vocab_size=tokenizer.get_vocab_size(), latent_dim=8, embed_dim=8, width=16, depth=1)
    save_codec(Codec(build_model(config), tokenizer, card={"train": {"steps_done": seed * 100}}), path)


def test_trend_measures_good_checkpoints_and_names_the_bad_one(tokenizer, tmp_path):
    for seed in (1, 2, 3):
        _save_small(tokenizer, tmp_path / f"run-{seed}.safetensors", seed)
    (tmp_path / "run-4.safetensors").write_bytes(b"not a checkpoint at all")
    points = list(trend(tmp_path, "A short text to sweep, with 3 numbers: 1, 2, 3.", SweepSettings(sigmas=(0.0, 0.5), repeats=1)))
    assert len(points) == 4
    bad = [p for p in points if p.error]
    assert len(bad) == 1 and bad[0].name == "run-4" and "run-4.safetensors" in bad[0].error
    good = sorted(p.step for p in points if not p.error)
    assert good == [100, 200, 300]  # from the cards
    assert all(p.step_source == "card" for p in points if not p.error)


def test_step_from_file_name():
    assert step_from_name("ckpt_step-12000") == 12000
    assert step_from_name("model-000500") == 500
    assert step_from_name("final") is None


class _Collector(HTMLParser):
    def __init__(self):
        super().__init__()
        self.ids, self.links, self.outside, self.tags = set(), [], [], []

    def handle_starttag(self, tag, attrs):
        attrs = dict(attrs)
        self.tags.append(tag)
        if "id" in attrs:
            self.ids.add(attrs["id"])
        if tag == "a" and attrs.get("href", "").startswith("#"):
            self.links.append(attrs["href"][1:])
        for key in ("src", "href"):
            value = attrs.get(key) or ""
            if value and not value.startswith("#"):
                self.outside.append((tag, key, value))
        if tag in ("script", "link", "iframe", "img"):
            self.outside.append((tag, "", ""))


def test_report_is_self_contained_and_holds_what_it_lists(tokenizer):
    a = OpenedCodec(LookupCodec(tokenizer, sharpness=20.0), CodecSource(sha256="ab" * 32))
    b = LookupCodec(tokenizer, sharpness=5.0)
    b.name = "soft"
    comparison = compare_codecs([a, b], TwoTokenizers.text, sigmas=GRID, repeats=1)
    html = build_report(comparison=comparison, title="Lab meeting")
    parser = _Collector()
    parser.feed(html)
    parser.close()
    assert parser.outside == []
    assert parser.links and set(parser.links) <= parser.ids
    for anchor in ("tolerances", "accuracy", "error-rate", "diff-0", "tests-0", "fragile", "provenance"):
        assert anchor in parser.links
    assert parser.tags.count("svg") >= 4
    assert "lookup" in html and "soft" in html and a.sha256 in html


def test_workspace_round_trip_keeps_numbers_without_recomputing(tokenizer, tmp_path, small_checkpoint):
    codec = LookupCodec(tokenizer)
    result = run_sweep(codec, chunk_text(TwoTokenizers.text, codec), SweepSettings(sigmas=GRID, repeats=2))
    ws = Workspace(
        checkpoints=[{"path": str(small_checkpoint), "sha256": "0" * 64, "name": "small"}],
        text=TwoTokenizers.text, text_source="pasted", settings={"sigma": 0.3}, sweeps={"lookup/data-scale": result},
    )
    path = save_workspace(ws, tmp_path / "meeting.chunkscope")
    with pytest.raises(FileExistsError):
        save_workspace(ws, path)
    again = load_workspace(path)
    assert again.text == ws.text and again.settings == {"sigma": 0.3}
    r2 = again.sweeps["lookup/data-scale"]
    assert json.dumps([c.to_dict() for c in r2.curves]) == json.dumps([c.to_dict() for c in result.curves])
    assert np.array_equal(r2.wrong_counts, result.wrong_counts)
    assert again.checkpoint_problems() == ["small.safetensors has changed since the workspace was saved (its sha256 differs)."]


def test_corrupt_workspace_gives_one_sentence(tmp_path):
    path = tmp_path / "broken.chunkscope"
    path.write_bytes(b"PK\x03\x04 but not really")
    with pytest.raises(ChunkscopeError, match="broken.chunkscope"):
        load_workspace(path)
