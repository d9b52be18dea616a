"""The tolerance vocabulary: absolute and loss tolerances on hand-made curves, the
too-few-tokens status, the one renderer and the JSON form, through every output."""

import io
import json

import pytest

from conftest import FIXTURE_TEXT
from core.cli import print_tolerance_table
from core.engine.sweep import SweepSettings, read_sweep, run_sweep
from core.engine.text import chunk_text
from core.engine.tolerance import (
    ABSOLUTE, LOSS, LOSS_LEVELS, TOLERANCE_LEVELS, Tolerance, level_name, loss_tolerance_at, resolution_gap, resolvable,
    tolerance_at, tolerance_text, tolerances_of,
)

SIGMAS = [0.0, 0.1, 0.2, 0.4]
CURVE = [0.98, 0.978, 0.96, 0.8]


def test_loss_tolerance_on_a_hand_made_curve():
    # worked by hand: loss 0.1 pt -> threshold 0.979, crossed between σ 0 (0.98) and 0.1 (0.978):
    # 0 + 0.1 · (0.98 − 0.979) / (0.98 − 0.978) = 0.05
    t = loss_tolerance_at(SIGMAS, CURVE, 0.001)
    assert (t.kind, t.status) == (LOSS, "ok") and t.sigma == pytest.approx(0.05)
    # worked by hand: loss 1 pt -> 0.97, between σ 0.1 (0.978) and 0.2 (0.96): 0.1 + 0.1 · 0.008 / 0.018
    assert loss_tolerance_at(SIGMAS, CURVE, 0.01).sigma == pytest.approx(0.1 + 0.1 * 0.008 / 0.018)
    # worked by hand: loss 10 pt -> 0.88, between σ 0.2 (0.96) and 0.4 (0.8): 0.2 + 0.2 · 0.08 / 0.16 = 0.3
    assert loss_tolerance_at(SIGMAS, CURVE, 0.1).sigma == pytest.approx(0.3)
    # the absolute levels on the same curve, worked by hand: 98 % at σ = 0 is below 99.9 % and 99 %;
    # 90 % is crossed between σ 0.2 and 0.4 at 0.2 + 0.2 · 0.06 / 0.16 = 0.275
    absolute, loss = tolerances_of(SIGMAS, CURVE)
    assert [t.status for t in absolute] == ["below_at_zero", "below_at_zero", "ok"]
    assert absolute[2].sigma == pytest.approx(0.275)
    assert [t.sigma for t in loss] == pytest.approx([0.05, 0.1 + 0.1 * 0.008 / 0.018, 0.3])


def test_a_codec_at_99_5_percent_fails_at_0_absolute_but_has_a_finite_loss_tolerance():
    sigmas, accuracy = [0.0, 0.5, 1.0], [0.995, 0.993, 0.9]
    absolute = tolerance_at(sigmas, accuracy, 0.999, tokens=10_000)
    loss = loss_tolerance_at(sigmas, accuracy, 0.001, tokens=10_000)
    assert tolerance_text(absolute) == "fails at 0"
    # worked by hand: threshold 0.994, between σ 0 (0.995) and 0.5 (0.993): 0.5 · 0.001 / 0.002 = 0.25
    assert loss.status == "ok" and loss.sigma == pytest.approx(0.25)
    assert tolerance_text(loss) == "0.25"


def test_loss_tolerance_needs_sigma_zero_and_never_fails_at_zero():
    assert loss_tolerance_at([0.3, 0.5], [0.9, 0.5], 0.01).status == "no_zero"
    assert tolerance_text(loss_tolerance_at([0.3, 0.5], [0.9, 0.5], 0.01)) == "needs σ = 0"
    flat = loss_tolerance_at([0.0, 1.0], [0.5, 0.5], 0.001)
    assert (flat.status, flat.sigma) == ("above_grid", 1.0)


def test_resolution_thresholds_worked_by_hand():
    # worked by hand: with no errors the Wilson 95 % interval is [n / (n + z²), 1], width z² / (n + z²),
    # z² = 3.8415; the gap is 0.9 points between 99.9 % and 99 % (0.1 pt and 1 pt), 9 points otherwise
    assert resolution_gap(0.999) == pytest.approx(0.009) and resolution_gap(0.99) == pytest.approx(0.09)
    assert resolution_gap(0.9) == pytest.approx(0.09) and resolution_gap(0.001, LOSS) == pytest.approx(0.009)
    # 3.8415 / 426.84 = 0.008999 <= 0.009, 3.8415 / 425.84 = 0.009021 > 0.009
    assert resolvable(1.0, 423, 0.999) and not resolvable(1.0, 422, 0.999)
    assert resolvable(1.0, 423, 0.001, LOSS) and not resolvable(1.0, 422, 0.001, LOSS)
    # 3.8415 / 42.84 = 0.0897 <= 0.09, 3.8415 / 41.84 = 0.0918 > 0.09
    assert resolvable(1.0, 39, 0.99) and not resolvable(1.0, 38, 0.99) and not resolvable(1.0, 38, 0.9)
    # 50 % on 10 000 tokens: interval about 0.49 to 0.51 (wider than 0.9 points) but wholly below 99.9 %,
    # so "fails at 0" is a measured verdict, while a 0.1-point loss cannot be resolved
    assert resolvable(0.5, 10_000, 0.999) and not resolvable(0.5, 10_000, 0.001, LOSS)


def test_one_renderer_for_every_status_and_form():
    assert tolerance_text(Tolerance(0.99, 0.20391, "ok")) == "0.2039"
    assert tolerance_text({"level": 0.99, "sigma": 2.0, "status": "above_grid"}) == "> 2"
    assert tolerance_text(0.5, "ok") == "0.5"  # the (sigma, status) form other code still calls
    assert tolerance_text(Tolerance(0.99, None, "below_at_zero")) == "fails at 0"
    assert tolerance_text(Tolerance(0.99, None, "unresolvable")) == "too few tokens"
    assert tolerance_text(Tolerance(0.99, 0.2039, "ok"), digits=3, prefix="σ ") == "σ 0.204"
    assert tolerance_text(None) == "—"
    assert [level_name(x) for x in TOLERANCE_LEVELS] == ["accuracy ≥ 99.9 %", "accuracy ≥ 99 %", "accuracy ≥ 90 %"]
    assert [level_name(x, LOSS) for x in LOSS_LEVELS] == ["loss ≤ 0.1 pt", "loss ≤ 1 pt", "loss ≤ 10 pt"]
    t = Tolerance(0.01, 0.3, "ok", LOSS)
    assert Tolerance.from_dict(json.loads(json.dumps(t.to_dict()))) == t
    assert Tolerance.from_dict({"level": 0.99, "sigma": 0.3, "status": "ok"}).kind == ABSOLUTE  # older files


def test_a_one_token_text_gets_no_tolerance_anywhere(lookup_codec, tmp_path):
    chunks = chunk_text("The", lookup_codec)
    assert chunks.num_tokens == 1
    result = run_sweep(lookup_codec, chunks, SweepSettings(sigmas=(0.0, 0.25, 0.5, 1.0), repeats=4, noise="isotropic"))
    assert result.curves[0].token_accuracy == 1.0  # right at σ = 0, and broken by σ = 0.5: before, "0.5" was printed
    assert {t.status for t in result.tolerances + result.loss_tolerances} == {"unresolvable"}
    assert all(t.label() == "too few tokens" for t in result.tolerances + result.loss_tolerances)
    out = io.StringIO()
    print_tolerance_table([result], stream=out)
    table = out.getvalue()
    assert table.count("too few tokens") == 6 and "no tolerance is resolvable on 1 token; the Wilson 95 % interval" in table
    folder = result.write(tmp_path / "one")
    data = json.loads((folder / "sweep.json").read_text(encoding="utf-8"))
    assert [t["status"] for t in data["tolerances"] + data["loss_tolerances"]] == ["unresolvable"] * 6
    assert [t["kind"] for t in data["loss_tolerances"]] == ["loss"] * 3
    again = read_sweep(folder)
    assert again.tolerances == result.tolerances and again.loss_tolerances == result.loss_tolerances


def test_a_tiny_text_resolves_the_coarse_levels_only(lookup_codec):
    chunks = chunk_text(FIXTURE_TEXT[:200], lookup_codec)
    n = chunks.num_tokens
    assert 39 <= n < 423  # between the two thresholds worked by hand above
    result = run_sweep(lookup_codec, chunks, SweepSettings(sigmas=(0.0, 0.25, 0.5, 1.0, 2.0), repeats=2, noise="isotropic"))
    assert result.curves[0].token_accuracy == 1.0
    assert [t.status == "unresolvable" for t in result.tolerances] == [True, False, False]
    assert [t.status == "unresolvable" for t in result.loss_tolerances] == [True, False, False]


def test_a_sweep_written_before_the_loss_tolerance_reads_back_with_it(lookup_codec, tmp_path):
    chunks = chunk_text(FIXTURE_TEXT, lookup_codec)
    result = run_sweep(lookup_codec, chunks, SweepSettings(sigmas=(0.0, 0.2, 0.4, 0.8, 1.6), repeats=2, noise="isotropic"))
    assert any(t.found for t in result.loss_tolerances)
    folder = result.write(tmp_path / "old")
    path = folder / "sweep.json"
    data = json.loads(path.read_text(encoding="utf-8"))
    del data["loss_tolerances"]
    for t in data["tolerances"]:
        del t["kind"]
    path.write_text(json.dumps(data), encoding="utf-8")
    again = read_sweep(folder)
    assert again.tolerances == result.tolerances
    assert again.loss_tolerances == result.loss_tolerances  # measured from the stored curve


def test_the_loss_tolerance_is_beside_the_absolute_one_in_the_report(lookup_codec):
    from core.outputs.report import build_report

    chunks = chunk_text(FIXTURE_TEXT, lookup_codec)
    result = run_sweep(lookup_codec, chunks, SweepSettings(sigmas=(0.0, 0.2, 0.4, 0.8, 1.6), repeats=2, noise="isotropic"))
    html = build_report(sweeps=[result])
    table = html[html.index('id="tolerances"'):html.index('id="accuracy"')]
    assert "accuracy ≥" in table and "loss from σ = 0 ≤" in table
    for t in result.tolerances + result.loss_tolerances:
        assert f"<td class=t>{t.label()}</td>" in table
    one = run_sweep(lookup_codec, chunk_text("The", lookup_codec), SweepSettings(sigmas=(0.0, 0.5), repeats=1, noise="isotropic"))
    html = build_report(sweeps=[one])
    assert "too few tokens" in html and "no tolerance is resolvable on 1 token" in html


def test_trend_points_carry_both_kinds_and_read_older_trend_files():
    from core.analyses.trend import TrendPoint, trend_csv

    absolute, loss = tolerances_of(SIGMAS, CURVE, tokens=10_000)
    point = TrendPoint("run/a.safetensors", "a", 100, "card", accuracy_at_zero=CURVE[0], tolerances=absolute,
                       loss_tolerances=loss, latent_rms=1.0)
    again = TrendPoint.from_dict(json.loads(json.dumps(point.to_dict())))
    assert again.tolerances == absolute and again.loss_tolerances == loss
    old = {"path": "run/b.safetensors", "name": "b", "step": 5, "step_source": "card", "sha256": "",
           "accuracy_at_zero": 0.98, "latent_rms": 1.0, "error": None,
           "tolerances": {"0.999": {"sigma": None, "status": "below_at_zero"}, "0.9": {"sigma": 0.275, "status": "ok"}}}
    read = TrendPoint.from_dict(old)  # trend.json before this change: keyed by level, no loss tolerances
    assert read.tolerance(0.9).sigma == 0.275 and read.tolerance(0.999).status == "below_at_zero"
    assert read.tolerance(0.01, LOSS) is None
    header, row = trend_csv([point]).splitlines()[:2]
    cells = dict(zip(header.split(","), row.split(",")))
    # worked by hand above: 90 % at 0.275; losses 0.05, 0.1444..., 0.3
    assert cells["tol_90"] == "0.275" and cells["tol_99.9"] == ""
    assert [float(cells[f"loss_tol_{p}"]) for p in ("0.1", "1", "10")] == pytest.approx([0.05, 0.1 + 0.1 * 0.008 / 0.018, 0.3], rel=1e-5)  # 6 digits
