"""Every CSV the tool writes goes through the csv module: checkpoint names holding commas
and quotes round-trip through csv.reader (RFC 4180 quoting, the csv module's default), and
numeric columns hold numbers only."""

import csv
import io

import pytest

from conftest import LookupCodec
from core.analyses.compare import compare_codecs, paired_csv, tolerance_csv
from core.analyses.trend import TREND_CSV_COLUMNS, TrendPoint, trend_csv
from core.engine.tolerance import Tolerance

NAMES = ('run 3, seed 1', 'the "wide" one')


def _rows(text: str) -> list[list[str]]:
    return list(csv.reader(io.StringIO(text, newline="")))


@pytest.fixture()
def comparison(tokenizer, fixture_text):
    a = LookupCodec(tokenizer)
    b = LookupCodec(tokenizer, seed=1)
    a.name, b.name = NAMES
    return compare_codecs([a, b], fixture_text, sigmas=(0.0, 0.4), repeats=1)


def test_compare_csvs_round_trip_names_with_commas_and_quotes(comparison, tmp_path):
    folder = comparison.write(tmp_path / "cmp")
    for name, made in (("tolerances.csv", tolerance_csv), ("paired.csv", paired_csv)):
        text = (folder / name).read_text(encoding="utf-8")
        assert text == made(comparison)
        header, *rows = _rows(text)
        assert rows and all(len(r) == len(header) for r in rows), name
    header, *rows = _rows(tolerance_csv(comparison))
    assert {r[header.index("checkpoint")] for r in rows} == set(NAMES)
    header, *rows = _rows(paired_csv(comparison))
    assert {(r[0], r[1]) for r in rows} == {NAMES}
    for r in rows:
        for column in ("sigma", "accuracy_a", "pvalue", "a_only"):
            float(r[header.index(column)])


def test_trend_csv_keeps_numbers_and_statuses_apart():
    ok = TrendPoint("/x/a.safetensors", NAMES[0], 100, "file name", sha256="a" * 64, accuracy_at_zero=1.0,
                    tolerances=[Tolerance(0.999, 0.02, "ok"), Tolerance(0.99, 0.05, "ok"),
                                Tolerance(0.9, 2.0, "above_grid")], latent_rms=0.7)
    fails = TrendPoint("/x/b.safetensors", NAMES[1], 200, "card", sha256="b" * 64, accuracy_at_zero=0.5,
                       tolerances=[Tolerance(level, None, "below_at_zero") for level in (0.999, 0.99, 0.9)],
                       latent_rms=0.3)
    broken = TrendPoint("/x/c.safetensors", "c", 300, "file name", error='c.safetensors is "truncated", badly.')
    header, *rows = _rows(trend_csv([broken, fails, ok]))
    assert header == TREND_CSV_COLUMNS
    assert all(len(r) == len(header) for r in rows)
    by_name = {r[0]: dict(zip(header, r)) for r in rows}
    assert set(by_name) == {NAMES[0], NAMES[1], "c"}
    numeric = ["step", "accuracy_at_sigma0", "tol_99.9", "tol_99", "tol_90", "latent_rms"]
    for row in by_name.values():
        for column in numeric:
            if row[column] != "":
                float(row[column])  # a number, never "0.02+" or "fails at 0"
    assert float(by_name[NAMES[0]]["tol_90"]) == 2.0 and by_name[NAMES[0]]["tol_90_status"] == "above_grid"
    assert by_name[NAMES[1]]["tol_99"] == "" and by_name[NAMES[1]]["tol_99_status"] == "below_at_zero"
    assert by_name["c"]["tol_99"] == "" and by_name["c"]["tol_99_status"] == "not measured"
    assert by_name["c"]["status"] == "error" and by_name[NAMES[1]]["status"] == "ok"
    assert by_name["c"]["error"] == 'c.safetensors is "truncated", badly.'  # quotes kept, not rewritten
