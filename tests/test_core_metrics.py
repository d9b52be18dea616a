"""Metric definitions checked against outside references, each named beside its check."""

import pytest
import torch
from scipy import stats

from core.engine.health import kl_to_standard_normal, nearest_distinct_half_distance
from core.engine.noise import NOISE_BLOCK, draw_eps
from core.engine.metrics import SigmaAccumulator, ece_bin_index, score_logits, wilson_interval


@pytest.mark.parametrize("successes,n", [(0, 10), (3, 10), (10, 10), (997, 1000), (12345, 12400), (1, 1)])
def test_wilson_interval_matches_statsmodels(successes, n):
    # reference: statsmodels.stats.proportion.proportion_confint(method="wilson")
    from statsmodels.stats.proportion import proportion_confint

    low, high = proportion_confint(successes, n, alpha=0.05, method="wilson")
    ours = wilson_interval(successes, n)
    assert ours == pytest.approx((low, high), abs=1e-12)


def _random_batch(seed=0, n=64, k=4, v=50, temperature=3.0):
    g = torch.Generator().manual_seed(seed)
    logits = torch.randn(n, k, v, generator=g) * temperature
    targets = torch.randint(0, v, (n, k), generator=g)
    # make most predictions right so the numbers are not trivial
    right = torch.rand(n, k, generator=g) < 0.7
    logits[right, targets[right]] += 6.0
    return logits, targets


def test_brier_matches_scikit_learn_multiclass():
    # reference: sklearn.metrics.brier_score_loss on multiclass probabilities (sum over classes, mean over samples)
    from sklearn.metrics import brier_score_loss

    logits, targets = _random_batch()
    mask = torch.ones_like(targets, dtype=torch.bool)
    acc = SigmaAccumulator(0.1, 4, 50)
    acc.update(logits, targets, mask)
    probs = torch.softmax(logits.double(), -1).reshape(-1, 50).numpy()
    expected = brier_score_loss(targets.reshape(-1).numpy(), probs, labels=list(range(50)))
    assert acc.compute().brier == pytest.approx(expected, rel=1e-5)


def test_nll_matches_torch_cross_entropy():
    # reference: torch.nn.functional.cross_entropy (mean negative log-likelihood of the true class)
    logits, targets = _random_batch(seed=1)
    acc = SigmaAccumulator(0.1, 4, 50)
    acc.update(logits, targets, torch.ones_like(targets, dtype=torch.bool))
    expected = torch.nn.functional.cross_entropy(logits.reshape(-1, 50).double(), targets.reshape(-1)).item()
    assert acc.compute().nll == pytest.approx(expected, rel=1e-5)


def test_ece_matches_torchmetrics_15_bins_l1():
    # reference: torchmetrics.classification.MulticlassCalibrationError(n_bins=15, norm="l1")
    from torchmetrics.classification import MulticlassCalibrationError

    logits, targets = _random_batch(seed=2, n=500, temperature=1.5)
    acc = SigmaAccumulator(0.1, 4, 50)
    # stream in two halves and merge: the accumulator must give the same as one pass
    half = SigmaAccumulator(0.1, 4, 50)
    acc.update(logits[:250], targets[:250], torch.ones(250, 4, dtype=torch.bool))
    half.update(logits[250:], targets[250:], torch.ones(250, 4, dtype=torch.bool))
    acc.merge(half)
    metric = MulticlassCalibrationError(num_classes=50, n_bins=15, norm="l1")
    expected = metric(torch.softmax(logits, -1).reshape(-1, 50), targets.reshape(-1)).item()
    assert acc.compute().ece == pytest.approx(expected, abs=1e-5)


def test_masked_tokens_do_not_count():
    logits, targets = _random_batch(seed=3, n=8)
    mask = torch.ones(8, 4, dtype=torch.bool)
    mask[-1, 2:] = False
    logits[-1, 2:] = 0.0  # garbage at padding positions
    acc = SigmaAccumulator(0.0, 4, 50)
    acc.update(logits, targets, mask)
    m = acc.compute()
    assert m.tokens == 30
    predicted = logits.argmax(-1)
    assert m.correct == int(((predicted == targets) & mask).sum())
    assert m.position_accuracy[3] == pytest.approx(float((predicted[:-1, 3] == targets[:-1, 3]).float().mean()))


def test_confusions_count_true_to_decoded():
    targets = torch.tensor([[1, 2, 3, 4]])
    logits = torch.full((1, 4, 6), -5.0)
    for pos, decoded in enumerate([1, 5, 5, 4]):
        logits[0, pos, decoded] = 5.0
    acc = SigmaAccumulator(0.0, 4, 6)
    acc.update(logits, targets, torch.ones(1, 4, dtype=torch.bool))
    assert sorted(acc.compute().confusions) == [(2, 5, 1), (3, 5, 1)]


def test_score_logits_probability_identities():
    # common practice: Brier = sum p^2 - 2 p_true + 1, confidence = max softmax probability
    logits, targets = _random_batch(seed=4)
    predicted, confidence, nll, brier = score_logits(logits, targets)
    p = torch.softmax(logits.double(), -1)
    assert torch.allclose(confidence.double(), p.max(-1).values, atol=1e-6)
    expected = (p - torch.nn.functional.one_hot(targets, 50)).square().sum(-1)
    assert torch.allclose(brier.double(), expected, atol=1e-5)


def test_ece_bins_are_equal_width_with_one_in_top_bin():
    conf = torch.tensor([0.0001, 1 / 15 - 1e-4, 1 / 15 + 1e-4, 0.5, 0.99, 1.0])
    assert ece_bin_index(conf).tolist() == [0, 0, 1, 7, 14, 14]


def test_kl_per_dimension_matches_torch_distributions():
    # reference: torch.distributions.kl_divergence(Normal(mu, s), Normal(0, 1))
    g = torch.Generator().manual_seed(0)
    mean = torch.randn(100, 8, generator=g)
    std = torch.rand(100, 8, generator=g) * 2 + 0.05
    expected = torch.distributions.kl_divergence(torch.distributions.Normal(mean, std), torch.distributions.Normal(0.0, 1.0))
    assert torch.allclose(kl_to_standard_normal(mean, std), expected, atol=1e-5)


def test_isotropic_noise_norm_follows_chi_distribution():
    # reference: scipy.stats.chi(df=D): the norm of a standard normal vector in D dimensions
    dim = 24
    eps = torch.cat([draw_eps(7, r, 0, 4 * NOISE_BLOCK, dim) for r in range(4)])
    norms = eps.norm(dim=1).double().numpy()
    result = stats.kstest(norms, stats.chi(df=dim).cdf)
    assert result.pvalue > 0.001
    # and a wrong dimension is rejected, so the check can fail
    assert stats.kstest(norms, stats.chi(df=dim + 4).cdf).pvalue < 1e-6


def test_noise_does_not_depend_on_batching():
    whole = draw_eps(3, 1, 0, 3 * NOISE_BLOCK, 5)
    parts = torch.cat([draw_eps(3, 1, i * NOISE_BLOCK, (i + 1) * NOISE_BLOCK, 5) for i in range(3)])
    assert torch.equal(whole, parts)
    assert not torch.equal(draw_eps(3, 2, 0, NOISE_BLOCK, 5), draw_eps(3, 1, 0, NOISE_BLOCK, 5))


def test_active_dimensions_are_those_whose_mean_varies_more_than_the_usual_threshold(tokenizer, fixture_text):
    # common practice (Burda et al., importance-weighted autoencoders): a dimension is active when
    # Var_x E[z|x] > 0.01. Eight dimensions whose mean has variance 0, 0.005, 0.0098, 0.0102, 0.02, 1,
    # 0.0099, 0.5 over the chunks: four are active, with either variance normalisation.
    from conftest import LookupCodec
    from core.engine.health import latent_health
    from core.engine.noise import Encoded
    from core.engine.text import chunk_text

    codec = LookupCodec(tokenizer, per_token_dim=2)
    chunks = chunk_text(fixture_text, codec)
    n = chunks.num_chunks
    assert n > 100  # so the 1/n and 1/(n-1) variances fall on the same side of 0.01
    pattern = torch.tensor([1.0, -1.0]).repeat(n)[:n]
    pattern = ((pattern - pattern.mean()) / pattern.std(unbiased=False)).unsqueeze(1)  # mean 0, variance 1
    variances = torch.tensor([0.0, 0.005, 0.0098, 0.0102, 0.02, 1.0, 0.0099, 0.5])
    mean = pattern * variances.sqrt() + 3.0  # an offset: the variance is about the mean, not about zero
    health = latent_health(codec, chunks, encoded=Encoded(mean, None))
    assert health.mean_variance_per_dim == pytest.approx(variances.numpy(), rel=1e-3, abs=1e-6)
    assert health.active_dims == 4 and health.summary()["active_dims"] == 4


def test_nearest_neighbour_half_distance_on_a_worked_example():
    # worked example: points 0, 1, 3 on a line -> nearest distances 1, 1, 2 -> halves 0.5, 0.5, 1
    points = torch.tensor([[0.0, 0.0], [1.0, 0.0], [3.0, 0.0]])
    assert nearest_distinct_half_distance(points, block=2).tolist() == [0.5, 0.5, 1.0]


def test_any_range_of_noise_matches_the_whole():
    whole = draw_eps(5, 0, 0, 3 * NOISE_BLOCK, 4)
    assert torch.equal(draw_eps(5, 0, 100, 700, 4), whole[100:700])
    assert torch.equal(draw_eps(5, 0, 300, 301, 4), whole[300:301])
