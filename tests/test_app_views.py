"""What the workbench shows beyond core's results (core.analyses.views, compare_view, tokens, and the
latent view's geometry check), checked against core itself and against straightforward definitions."""

import numpy as np
import pytest
import torch

from core.codecs.checkpoint import Codec
from core.errors import SettingsError
from core.engine.noise import encode_chunks
from core.analyses.live import perturb_once
from core.codecs.model import ChunkMLPConfig, build_model
from core.engine.text import chunk_text, demo_text
from core.codecs.tokenizer import train_byte_bpe
from core.codecs.tokenizer import token_display
from core.analyses.views import (
    critical_sigma_levels, decoded_layout, merge_windows, on_screen_first, perturb_on_screen_first, perturb_window,
    remaining_ranges, sigma_grid, token_at, token_layout,
)


@pytest.fixture(scope="module")
def setup():
    torch.manual_seed(0)
    text = demo_text()[:6000]
    tokenizer = train_byte_bpe([text], 300)
    config = ChunkMLPConfig(chunk_size=4, vocab_size=tokenizer.get_vocab_size(), latent_dim=8, embed_dim=16, width=32, depth=1)
    codec = Codec(model=build_model(config), tokenizer=tokenizer)
    chunks = chunk_text(text, codec)
    return codec, chunks, encode_chunks(codec, chunks)


@pytest.mark.parametrize("start, stop", [(300, 310), (250, 530), (0, 256), (17, 18)])
def test_windows_merge_into_the_engines_whole_text_perturbation(setup, start, stop):
    """The reference is core.analyses.live.perturb_once over the whole text with the same noise; the
    on-screen window may start and end anywhere, also across noise blocks of 256 chunks."""
    codec, chunks, encoded = setup
    n = encoded.num_chunks
    assert n > 530, "the text must span more than two noise blocks for this check"
    windows = [perturb_window(codec, chunks, encoded, 0.8, "data-scale", 3, 1, start, stop)]
    for a, b in remaining_ranges(n, start, stop):
        windows.append(perturb_window(codec, chunks, encoded, 0.8, "data-scale", 3, 1, a, b))
    merged = merge_windows(chunks, windows)
    reference = perturb_once(codec, chunks, encoded, 0.8, "data-scale", seed=3, draw=1)
    np.testing.assert_array_equal(merged.predicted, reference.predicted)
    np.testing.assert_array_equal(merged.top_ids, reference.top_ids)
    np.testing.assert_allclose(merged.top_probs, reference.top_probs, atol=1e-5)
    assert merged.token_accuracy == pytest.approx(reference.token_accuracy)
    assert merged.chunk_exact_rate == pytest.approx(reference.chunk_exact_rate)


def test_the_quick_window_decodes_like_the_full_one(setup):
    # top_k=0 is the argmax-only pass the live view shows first; it must agree with the full pass
    codec, chunks, encoded = setup
    quick = perturb_window(codec, chunks, encoded, 0.6, "isotropic", 1, 0, 40, 300, top_k=0)
    full = perturb_window(codec, chunks, encoded, 0.6, "isotropic", 1, 0, 40, 300, top_k=5)
    assert quick.top_ids.shape == (quick.token_stop - quick.token_start, 0)
    np.testing.assert_array_equal(quick.predicted, full.predicted)
    np.testing.assert_array_equal(quick.correct, full.correct)
    assert quick.exact_chunks == full.exact_chunks
    assert not quick.correct.all(), "sigma 0.6 should break some tokens of an untrained model"


def test_a_stopped_window_returns_nothing(setup):
    codec, chunks, encoded = setup
    assert perturb_window(codec, chunks, encoded, 0.5, "isotropic", 0, 0, 0, 256, should_stop=lambda: True) is None


def test_decoded_layout_keeps_right_tokens_and_shows_wrong_ones(setup):
    codec, chunks, _ = setup
    predicted = chunks.token_ids.copy()
    correct = np.ones(len(predicted), dtype=bool)
    layout = decoded_layout(codec, chunks, predicted, correct)
    assert layout.text == chunks.text
    other = int((predicted[5] + 7) % codec.vocab_size) or 2
    predicted[5], correct[5] = other, False
    layout = decoded_layout(codec, chunks, predicted, correct)
    a, b = layout.spans[5]
    assert layout.text[a:b] == token_display(codec.tokenizer, other) and b > a  # the wrong token, shown
    assert token_at(layout.spans, int(a)) == 5
    assert layout.text.startswith(chunks.text[: chunks.spans[5, 0]])
    assert layout.text[b:] == chunks.text[chunks.spans[6, 0]:]  # the right tokens after it keep their characters


def test_decoded_layout_matches_its_definition_token_by_token(setup):
    # the definition: right tokens keep their characters, wrong ones show the decoded token
    codec, chunks, _ = setup
    rng = np.random.default_rng(4)
    predicted = chunks.token_ids.copy()
    correct = rng.random(len(predicted)) > 0.3
    correct[:3] = False  # wrong tokens at the very start and end too
    correct[-2:] = False
    predicted[~correct] = rng.integers(2, codec.vocab_size, int((~correct).sum()))
    correct = predicted == chunks.token_ids
    for token_start, n in ((0, len(predicted)), (101, 333)):
        p, c = predicted[token_start : token_start + n], correct[token_start : token_start + n]
        pieces = [
            chunks.text[chunks.spans[token_start + j, 0] : chunks.spans[token_start + j, 1]] if c[j]
            else token_display(codec.tokenizer, int(p[j]))
            for j in range(n)
        ]
        layout = decoded_layout(codec, chunks, p, c, token_start=token_start)
        assert layout.text == "".join(pieces)
        assert [layout.text[a:b] for a, b in layout.spans.tolist()] == pieces


def test_sigma_grid_and_levels():
    grid = sigma_grid(0.01, 1.0, 3, "log", include_zero=True)
    assert grid == (0.0, 0.01, 0.1, 1.0)
    assert sigma_grid(0, 1, 3, "linear", include_zero=False) == (0.0, 0.5, 1.0)
    with pytest.raises(SettingsError):
        sigma_grid(0.0, 1.0, 5, "log")
    levels = critical_sigma_levels(np.array([np.nan, 0.0, 0.1, 1.0]), grid)
    assert levels.tolist() == [-1, 0, 2, 3]


# ---- the text as decoded, for the live and compare views --------------------------------

def _layout_by_definition(text, spans, predicted, correct, display):
    """Token by token: right tokens keep their characters, wrong ones show display(decoded)."""
    pieces = [text[a:b] if ok else display(int(p)) for (a, b), ok, p in zip(spans.tolist(), correct.tolist(), predicted.tolist())]
    return "".join(pieces), pieces


def test_token_layout_matches_its_definition_with_astral_and_empty_pieces():
    # astral characters (two UTF-16 units, one Python character), empty spans (a token holding
    # part of a character) and display pieces of any length, empty ones included
    text = "a😀bc 𝔘nicode ẞ end"
    bounds = [0, 1, 2, 2, 3, 5, 6, 12, 13, 14, 16, 18]
    spans = np.array(list(zip(bounds[:-1], bounds[1:])), dtype=np.int64)
    rng = np.random.default_rng(1)
    table = {7: "🙂🙂", 8: "", 9: "x", 10: "#10"}
    for _ in range(20):
        correct = rng.random(len(spans)) > 0.5
        predicted = rng.choice(list(table), len(spans))
        layout = token_layout(text, spans, predicted, correct, table.__getitem__)
        whole, pieces = _layout_by_definition(text, spans, predicted, correct, table.__getitem__)
        assert layout.text == whole
        assert [layout.text[a:b] for a, b in layout.spans.tolist()] == pieces
    empty = token_layout("", np.zeros((0, 2), dtype=np.int64), np.zeros(0, dtype=np.int64), np.zeros(0, dtype=bool), str)
    assert empty.text == "" and empty.spans.shape == (0, 2)


def test_token_layout_looks_up_each_wrong_piece_once(setup):
    codec, chunks, _ = setup
    calls = []
    predicted = np.full(chunks.num_tokens, 5, dtype=np.int64)
    layout = token_layout(chunks.text, chunks.spans, predicted, np.zeros(chunks.num_tokens, dtype=bool),
                          lambda t: calls.append(t) or "Z")
    assert calls == [5] and layout.text == "Z" * chunks.num_tokens


@pytest.fixture(scope="module")
def two_sweeps(setup):
    from core.codecs.tokenizer import train_byte_bpe as train
    from core.engine.sweep import SweepSettings, run_sweep

    codec, chunks, encoded = setup
    settings = SweepSettings(sigmas=(0.0, 0.4, 1.2), repeats=1, seed=2)
    a = run_sweep(codec, chunks, settings, encoded=encoded)
    torch.manual_seed(5)
    config = ChunkMLPConfig(chunk_size=4, vocab_size=codec.vocab_size, latent_dim=8, embed_dim=16, width=32, depth=1)
    other = Codec(model=build_model(config), tokenizer=codec.tokenizer)
    b = run_sweep(other, chunk_text(chunks.text, other), settings)
    foreign = Codec(model=build_model(ChunkMLPConfig(chunk_size=4, vocab_size=280, latent_dim=8, embed_dim=16, width=32, depth=1)),
                    tokenizer=train([chunks.text[::-1]], 280))
    c = run_sweep(foreign, chunk_text(chunks.text, foreign), settings)
    return a, b, c


def test_side_by_side_panes_and_marks_match_their_definition(two_sweeps):
    from core.analyses.compare import unit_correctness
    from core.analyses.compare_view import BOTH, ONLY_A, ONLY_B, side_by_side

    a, b, _ = two_sweeps
    for i in range(len(a.sigmas)):
        view = side_by_side(a, b, i, 0, "token")
        for result, pane in ((a, view.a), (b, view.b)):
            correct = result.decoded[:, i].astype(np.int64) == result.chunks.token_ids
            whole, _ = _layout_by_definition(result.chunks.text, result.chunks.spans, result.decoded[:, i], correct,
                                             result.display)
            assert pane.text == whole and pane.wrong == int((~correct).sum())
        ca, cb = unit_correctness(a, i, "token"), unit_correctness(b, i, "token")
        expected = [ONLY_A if x and not y else ONLY_B if y and not x else BOTH if not (x or y) else 0
                    for x, y in zip(ca.tolist(), cb.tolist())]
        assert view.a.levels.tolist() == expected == view.b.levels.tolist()
        assert view.marked_counts() == (int((ca & ~cb).sum()), int((~ca & cb).sum()))


def test_character_marks_take_the_strongest_mark_of_the_tokens_characters(two_sweeps):
    from core.analyses.compare import comparison_unit, unit_correctness
    from core.analyses.compare_view import BOTH, ONLY_A, ONLY_B, side_by_side

    a, _, c = two_sweeps
    assert comparison_unit(a, c) == "character"
    i = len(a.sigmas) - 1
    view = side_by_side(a, c, i, 0, "character")
    ca, cc = unit_correctness(a, i, "character"), unit_correctness(c, i, "character")
    for result, pane in ((a, view.a), (c, view.b)):
        for t, (s, e) in enumerate(result.chunks.spans.tolist()):
            chars = range(s, max(e, s + 1))  # an empty span stands on the character it is part of
            marks = {ONLY_A if x and not y else ONLY_B if y and not x else BOTH if not (x or y) else 0
                     for x, y in ((bool(ca[j]), bool(cc[j])) for j in chars if j < len(ca))}
            strongest = next((m for m in (ONLY_A, ONLY_B, BOTH) if m in marks), 0)
            assert pane.levels[t] == strongest


def test_the_text_view_opens_where_a_and_b_differ_significantly():
    from core.analyses.compare import PairedComparison, PairedRow
    from core.analyses.compare_view import first_sigma_to_show

    def row(p, a_only, b_only):
        return PairedRow(0.1, 0.9, 0.9, 0.0, a_only, b_only, 100, 1.0, p, "exact")

    assert first_sigma_to_show(PairedComparison("a", "b", "token", [row(0.5, 1, 1), row(0.01, 2, 9), row(0.001, 40, 0)])) == 1
    assert first_sigma_to_show(PairedComparison("a", "b", "token", [row(0.5, 1, 1), row(0.3, 3, 9), row(0.2, 4, 1)])) == 1
    assert first_sigma_to_show(None) == 0


# ---- the live view's order of work --------------------------------------------------------

def test_on_screen_first_decodes_the_screen_quickly_then_tiles_the_text():
    steps = on_screen_first(1000, 4, first_token=402, last_token=519, top_k=5)
    assert (steps[0].start, steps[0].stop, steps[0].top_k, steps[0].show) == (100, 130, 0, True)
    assert [(s.start, s.stop, s.top_k, s.show) for s in steps[1:]] == [(100, 130, 5, False), (130, 1000, 5, False),
                                                                         (0, 100, 5, False)]
    for n, first, last in ((1, 0, 0), (7, 0, 27), (7, 20, 27), (300, 1196, 1199), (300, 0, 0)):
        steps = on_screen_first(n, 4, first, last)
        covered = sorted((s.start, s.stop) for s in steps[1:])
        assert covered[0][0] == 0 and covered[-1][1] == n
        assert all(x[1] == y[0] for x, y in zip(covered, covered[1:])), covered
        assert steps[0].start <= first // 4 < steps[0].stop or first // 4 >= n
    assert on_screen_first(0, 4, 0, 0) == []


def test_on_screen_first_gives_the_whole_text_perturbation(setup):
    # reference: core.analyses.live.perturb_once over the whole text with the same noise
    codec, chunks, encoded = setup
    shown = []
    whole = perturb_on_screen_first(codec, chunks, encoded, 0.7, "data-scale", 2, 1, 1100, 1400, top_k=5,
                                    on_screen=shown.append)
    reference = perturb_once(codec, chunks, encoded, 0.7, "data-scale", seed=2, draw=1)
    np.testing.assert_array_equal(whole.predicted, reference.predicted)
    np.testing.assert_array_equal(whole.top_ids, reference.top_ids)
    assert whole.chunk_exact_rate == pytest.approx(reference.chunk_exact_rate)
    (quick,) = shown
    assert quick.chunk_start == 1100 // 4 and quick.top_ids.shape[1] == 0
    np.testing.assert_array_equal(quick.predicted, reference.predicted[quick.token_start:quick.token_stop])
    assert perturb_on_screen_first(codec, chunks, encoded, 0.7, "data-scale", 2, 1, 0, 10,
                                   should_stop=lambda: True) is None


# ---- the latent and token views' numbers -------------------------------------------------

def test_geometry_check_holds_the_noise_against_the_half_distances(setup):
    from core.engine.health import expected_noise_norm, geometry_check, latent_health

    codec, chunks, encoded = setup
    health = latent_health(codec, chunks, encoded=encoded)
    half = health.nn_half_distance
    for sigma in (0.01, 0.3, 3.0):
        check = geometry_check(health, sigma, "isotropic", encoded)
        norm = expected_noise_norm(sigma, "isotropic", encoded)
        closer = sum(1 for h in half.tolist() if h < norm) / len(half)
        assert check.noise_norm == norm and check.closer == pytest.approx(closer)
        assert check.limit == ("geometry" if closer > 0.5 else "decoder")
    assert geometry_check(health, 0.01, "isotropic", encoded).limit == "decoder"
    assert geometry_check(health, 100.0, "isotropic", encoded).limit == "geometry"


def test_the_most_fragile_occurrence_of_a_token_type(two_sweeps):
    from core.analyses.tokens import broken_count, most_fragile_occurrence

    result = two_sweeps[0]
    crit = result.critical_sigma
    ids = result.chunks.token_ids
    assert broken_count(result) == sum(1 for c in crit.tolist() if c == c)
    for tid in np.unique(ids)[:40].tolist():
        where = [i for i in range(len(ids)) if ids[i] == tid]
        best = min(where, key=lambda i: (np.inf if np.isnan(crit[i]) else crit[i], i))
        assert most_fragile_occurrence(result, tid) == best
    overall = min(range(len(ids)), key=lambda i: (np.inf if np.isnan(crit[i]) else crit[i], i))
    assert most_fragile_occurrence(result) == overall
    assert most_fragile_occurrence(result, 10**6) is None
