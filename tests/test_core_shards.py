"""Shards of a sweep: any NOISE_BLOCK-aligned split of a text, swept range by range and merged,
gives the one-process sweep (run_sweep) — counts identical, float sums within rounding.

Reference for the sums: the one-process sweep itself, plus the fact that floating-point
addition is associative only up to rounding (common practice: compare sums with a relative
tolerance, counts exactly)."""

import pickle

import numpy as np
import pytest
import torch

from conftest import LookupCodec
from core.engine.metrics import SigmaAccumulator
from core.engine.noise import NOISE_BLOCK, encode_chunks
from core.engine.sweep import SweepSettings, merge_shards, plan_sweep, run_sweep, sweep_shard
from core.engine.text import chunk_text
from core.errors import ChunkscopeError, SettingsError

TEXT = "Signal box 7 to the valley line: 06:45 held at Ober-Ränk, 2 min late; coal €14.20/t. " * 80
GRID = (0.0, 0.1, 0.3, 0.6, 1.2)


def _random_split(rng: np.random.Generator, n_chunks: int) -> list[tuple[int, int]]:
    """Random cut points on the NOISE_BLOCK grid (sorted, distinct), the last range ending at the text's end."""
    inner = list(range(NOISE_BLOCK, n_chunks, NOISE_BLOCK))
    cuts = sorted(rng.choice(inner, size=rng.integers(1, len(inner) + 1), replace=False).tolist())
    edges = [0] + cuts + [n_chunks]
    return list(zip(edges, edges[1:]))


def assert_same_sweep(merged, whole):
    """Counts exactly; float sums (nll, brier, ece) within 1e-9 relative: the same numbers added in another order."""
    assert np.array_equal(merged.wrong_counts, whole.wrong_counts)
    assert np.array_equal(merged.decoded, whole.decoded)
    assert merged.wrong_counts.dtype == whole.wrong_counts.dtype and merged.decoded.dtype == whole.decoded.dtype
    assert np.array_equal(merged.critical_sigma, whole.critical_sigma, equal_nan=True)
    assert merged.decoded_chunks == whole.decoded_chunks
    for m, w in zip(merged.curves, whole.curves, strict=True):
        assert (m.sigma, m.tokens, m.correct, m.chunks, m.chunks_exact) == (w.sigma, w.tokens, w.correct, w.chunks, w.chunks_exact)
        assert m.position_accuracy == w.position_accuracy and m.bucket_tokens == w.bucket_tokens
        assert np.array_equal(m.bucket_accuracy, w.bucket_accuracy, equal_nan=True)
        assert m.confusions == w.confusions
        for name in ("nll", "brier", "ece"):
            assert getattr(m, name) == pytest.approx(getattr(w, name), rel=1e-9, abs=1e-12), name
    assert [t.to_dict() for t in merged.tolerances] == [t.to_dict() for t in whole.tolerances]
    assert merged.latent_rms == pytest.approx(whole.latent_rms, rel=1e-9)


@pytest.fixture(scope="module")
def lookup(tokenizer):
    return LookupCodec(tokenizer)


@pytest.mark.parametrize("noise", ["isotropic", "data-scale"])
def test_random_aligned_splits_merge_into_the_one_process_sweep(lookup, noise):
    chunks = chunk_text(TEXT, lookup)
    assert chunks.num_chunks > 4 * NOISE_BLOCK and chunks.num_chunks % NOISE_BLOCK  # several blocks and a ragged end
    settings = SweepSettings(sigmas=GRID, repeats=3, noise=noise, seed=4)
    whole = run_sweep(lookup, chunks, settings)
    rng = np.random.default_rng(7)
    for _ in range(4):
        plan = plan_sweep(lookup, chunks, settings)
        ranges = _random_split(rng, plan.n_chunks)
        shards = [sweep_shard(lookup, chunks, plan, a, b) for a, b in ranges]
        rng.shuffle(shards)  # the order shards come back in does not matter
        assert_same_sweep(merge_shards(plan, shards, chunks, lookup), whole)


def test_a_variational_codec_under_posterior_noise_merges_exactly(small_codec):
    """A real (untrained) chunk-mlp: encoded per batch on the worker, posterior std per chunk."""
    chunks = chunk_text(TEXT, small_codec)
    settings = SweepSettings(sigmas=GRID, repeats=2, noise="posterior", seed=1, batch_chunks=NOISE_BLOCK)
    whole = run_sweep(small_codec, chunks, settings)
    plan = plan_sweep(small_codec, chunks, settings)
    ranges = _random_split(np.random.default_rng(3), plan.n_chunks)
    k = plan.chunk_size
    # each shard gets only its own token ids, as a worker would
    shards = [sweep_shard(small_codec, chunks.token_ids[a * k : b * k], plan, a, b) for a, b in ranges]
    assert_same_sweep(merge_shards(plan, shards, chunks, small_codec), whole)


def test_given_latents_and_planned_ranges_give_the_same_result(lookup):
    chunks = chunk_text(TEXT, lookup)
    settings = SweepSettings(sigmas=GRID, repeats=2, noise="data-scale", batch_chunks=512)
    encoded = encode_chunks(lookup, chunks)
    whole = run_sweep(lookup, chunks, settings)
    plan = plan_sweep(lookup, chunks, settings, encoded=encoded)
    ranges = plan.shard_ranges(3)
    assert ranges[0][0] == 0 and ranges[-1][1] == plan.n_chunks and all(a % 512 == 0 for a, _ in ranges)
    assert all(b == c for (_, b), (c, _) in zip(ranges, ranges[1:]))
    shards = [sweep_shard(lookup, chunks, plan, a, b, encoded=encoded) for a, b in ranges]
    assert_same_sweep(merge_shards(plan, shards, chunks, lookup), whole)


def test_a_plan_and_a_shard_survive_pickling(lookup):
    chunks = chunk_text(TEXT, lookup)
    settings = SweepSettings(sigmas=GRID, repeats=2, noise="data-scale")
    plan = plan_sweep(lookup, chunks, settings)
    ranges = [(0, 2 * NOISE_BLOCK), (2 * NOISE_BLOCK, plan.n_chunks)]
    shards = [sweep_shard(lookup, chunks, plan, a, b) for a, b in ranges]
    again_plan = pickle.loads(pickle.dumps(plan))
    again = [pickle.loads(pickle.dumps(sh)) for sh in shards]
    for sh, sh2 in zip(shards, again):
        assert np.array_equal(sh.wrong_counts, sh2.wrong_counts) and np.array_equal(sh.decoded, sh2.decoded)
    assert_same_sweep(merge_shards(again_plan, again, chunks, lookup), run_sweep(lookup, chunks, settings))


def test_an_accumulator_state_round_trips_and_two_halves_merge(lookup):
    """STYLE.md: two partial results merge. Reference: one accumulator fed every batch (common practice)."""
    torch.manual_seed(0)
    vocab, k = 50, 4
    batches = [(torch.randn(8, k, vocab) * 3, torch.randint(0, vocab, (8, k)), torch.rand(8, k) > 0.2) for _ in range(6)]
    one, a, b = (SigmaAccumulator(0.5, k, vocab) for _ in range(3))
    for i, (logits, targets, mask) in enumerate(batches):
        one.update(logits.clone(), targets, mask)
        (a if i < 3 else b).update(logits.clone(), targets, mask)
    a = SigmaAccumulator.from_state(pickle.loads(pickle.dumps(a.state())))
    a.merge(SigmaAccumulator.from_state(b.state()))
    x, y = a.compute(), one.compute()
    assert (x.tokens, x.correct, x.chunks_exact, x.confusions) == (y.tokens, y.correct, y.chunks_exact, y.confusions)
    assert x.nll == pytest.approx(y.nll, rel=1e-12) and x.ece == pytest.approx(y.ece, rel=1e-12)
    with pytest.raises(ValueError):
        a.merge(SigmaAccumulator(0.25, k, vocab))


def test_misaligned_gapped_or_foreign_shards_are_refused(lookup, tokenizer):
    chunks = chunk_text(TEXT, lookup)
    plan = plan_sweep(lookup, chunks, SweepSettings(sigmas=(0.0, 0.5), repeats=1, noise="isotropic"))
    with pytest.raises(SettingsError, match="multiples of 256"):
        sweep_shard(lookup, chunks, plan, 100, 512)
    with pytest.raises(SettingsError, match="tokens"):
        sweep_shard(lookup, chunks.token_ids[:10], plan, 0, NOISE_BLOCK)
    other = chunk_text(TEXT + " one more line", lookup)
    with pytest.raises(SettingsError, match="not the text"):
        sweep_shard(lookup, other, plan, 0, NOISE_BLOCK)
    first = sweep_shard(lookup, chunks, plan, 0, NOISE_BLOCK)
    last = sweep_shard(lookup, chunks, plan, 2 * NOISE_BLOCK, plan.n_chunks)
    with pytest.raises(ChunkscopeError, match="do not cover chunks 256..512"):
        merge_shards(plan, [first, last], chunks, lookup)
    with pytest.raises(ChunkscopeError, match="stop at chunk 256"):
        merge_shards(plan, [first], chunks, lookup)


def test_a_shard_of_another_plan_is_refused_not_cut_short(lookup):
    chunks = chunk_text(TEXT, lookup)
    plan = plan_sweep(lookup, chunks, SweepSettings(sigmas=(0.0, 0.5), repeats=1, noise="isotropic"))
    wider = plan_sweep(lookup, chunks, SweepSettings(sigmas=(0.0, 0.5, 1.0), repeats=1, noise="isotropic"))
    shards = [sweep_shard(lookup, chunks, plan, a, min(a + NOISE_BLOCK, plan.n_chunks)) for a in range(0, plan.n_chunks, NOISE_BLOCK)]
    shards[1] = sweep_shard(lookup, chunks, wider, NOISE_BLOCK, 2 * NOISE_BLOCK)
    with pytest.raises(ChunkscopeError, match="was not swept by this plan"):
        merge_shards(plan, shards, chunks, lookup)


def _same_plan(a, b):
    """Every field of two SweepPlans equal; arrays bit for bit."""
    for name in a.__dataclass_fields__:
        x, y = getattr(a, name), getattr(b, name)
        if isinstance(x, np.ndarray) or isinstance(y, np.ndarray):
            assert x.dtype == y.dtype and np.array_equal(x, y), name
        else:
            assert x == y, name


def test_a_planning_pass_cut_into_block_ranges_gives_plan_sweeps_plan_exactly(lookup):
    """The cluster's sharded planning pass: scale_parts over ENCODE_BATCH-aligned ranges, summed in
    order, is plan_sweep's own measurement, so every shard perturbs with the same r. Reference:
    plan_sweep on the whole text; exact because each block is encoded alike and added in the same order
    (floating-point addition is not associative, so the order is the whole point; common practice)."""
    from core.engine.noise import ENCODE_BATCH, LatentScale, scale_parts
    from core.engine.sweep import chunk_ranges

    chunks = chunk_text(TEXT * 14, lookup)
    n, k = chunks.num_chunks, chunks.chunk_size
    assert n > 2 * ENCODE_BATCH and n % ENCODE_BATCH  # three blocks, the last ragged
    settings = SweepSettings(sigmas=GRID, repeats=2, noise="data-scale")
    whole = plan_sweep(lookup, chunks, settings)
    for parts in (1, 2, 3, 7):
        ranges = chunk_ranges(n, ENCODE_BATCH, parts)
        assert ranges[0][0] == 0 and ranges[-1][1] == n and all(a % ENCODE_BATCH == 0 for a, _ in ranges)
        measured = {a: scale_parts(lookup, chunks.token_ids[a * k : b * k], chunks.pad_id, a, b) for a, b in ranges[::-1]}
        scale = LatentScale.of_parts([p for a in sorted(measured) for p in measured[a]], n)
        _same_plan(plan_sweep(lookup, chunks, settings, scale=scale), whole)
    # and the reference itself: r is the RMS of the encoder means over all chunks (DESIGN.md's data scale)
    mean = lookup.encode(chunks.ids())[0].double()
    np.testing.assert_allclose(whole.data_scale, mean.square().mean(0).sqrt().numpy(), rtol=1e-6)
    with pytest.raises(SettingsError, match="multiple of 4096"):
        scale_parts(lookup, chunks.token_ids, chunks.pad_id, 100, 200)
    with pytest.raises(SettingsError, match="measured over"):
        plan_sweep(lookup, chunks, settings, scale=LatentScale(np.ones(lookup.latent_dim), n - 1))
