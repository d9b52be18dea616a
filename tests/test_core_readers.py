"""Reading result files back: a damaged sweep folder, comparison folder or workspace gives
one sentence naming the file and what is wrong, never a KeyError or numpy's advice."""

import json
import zipfile

import numpy as np
import pytest

from conftest import LookupCodec
from core.analyses.compare import compare_codecs, read_comparison
from core.engine.sweep import SweepSettings, read_sweep, run_sweep
from core.engine.text import chunk_text
from core.errors import ChunkscopeError
from core.outputs.workspace import Workspace, load_workspace, save_workspace

GRID = (0.0, 0.3, 0.8)


@pytest.fixture()
def sweep_folder(lookup_codec, fixture_text, tmp_path):
    result = run_sweep(lookup_codec, chunk_text(fixture_text, lookup_codec), SweepSettings(sigmas=GRID, repeats=1))
    return result.write(tmp_path / "lookup")


def _one_sentence(exc: Exception, *words: str) -> str:
    message = str(exc)
    assert isinstance(exc, ChunkscopeError), type(exc)
    assert "\n" not in message and message.endswith("."), message
    for word in words:
        assert word in message, (word, message)
    return message


def _edit_json(path, change):
    data = json.loads(path.read_text())
    path.write_text(json.dumps(change(data)))


@pytest.mark.parametrize(
    "change,words",
    [
        (lambda d: {"provenance": 1}, ["sweep.json", '"settings" entry is missing']),
        (lambda d: {"settings": 5}, ["sweep.json", '"settings" entry is a number, not an object']),
        (lambda d: {k: v for k, v in d.items() if k != "settings"}, ["sweep.json", '"settings" entry is missing']),
        (lambda d: {**d, "provenance": 1}, ["sweep.json", '"provenance" entry is a number']),
        (lambda d: [d], ["sweep.json", "a list, not an object"]),
        (lambda d: {**d, "curves": d["curves"][:1]}, ["sweep.json", "1 curve points for 3 sigmas"]),
        (lambda d: {**d, "settings": {**d["settings"], "repeats": "two"}}, ["sweep.json", '"settings.repeats" entry is a string']),
        (lambda d: {**d, "curves": [{"sigma": 0}] * 3}, ["sweep.json", "curves"]),
        (lambda d: {**d, "tolerances": [{"level": 0.9}]}, ["sweep.json", "tolerances"]),
    ],
)
def test_damaged_sweep_json_gives_one_sentence(sweep_folder, change, words):
    _edit_json(sweep_folder / "sweep.json", change)
    with pytest.raises(Exception) as info:
        read_sweep(sweep_folder)
    _one_sentence(info.value, str(sweep_folder), *words)


def test_sweep_json_that_is_not_json(sweep_folder):
    (sweep_folder / "sweep.json").write_text("{not json")
    with pytest.raises(ChunkscopeError) as info:
        read_sweep(sweep_folder)
    _one_sentence(info.value, "sweep.json", "not valid JSON")


def test_arrays_holding_pickled_objects_are_never_loaded(sweep_folder):
    with np.load(sweep_folder / "arrays.npz") as npz:
        arrays = {k: npz[k] for k in npz.files}
    arrays["token_ids"] = np.array([{"a": 1}, "b"], dtype=object)  # an object array is stored as a pickle
    np.savez(sweep_folder / "arrays.npz", **arrays)
    with pytest.raises(ChunkscopeError) as info:
        read_sweep(sweep_folder)
    message = _one_sentence(info.value, "arrays.npz", "damaged or was not written by chunkscope")
    assert "pickle" not in message.replace(str(sweep_folder), "").lower()  # never repeat numpy's advice to allow pickles


@pytest.mark.parametrize(
    "damage,words",
    [
        (lambda f: (f / "arrays.npz").write_bytes(b"not a zip at all"), ["arrays.npz"]),
        (lambda f: (f / "arrays.npz").unlink(), ["not a sweep folder", "arrays.npz is missing"]),
        (lambda f: np.savez(f / "arrays.npz", token_ids=np.zeros(3, dtype=np.int64)), ["arrays.npz", "spans is missing"]),
        (lambda f: _replace_array(f, "decoded", lambda a: np.zeros((2, 2), dtype=np.int16)), ["arrays.npz", "decoded has shape [2, 2]"]),
        (lambda f: _replace_array(f, "critical_sigma", lambda a: a.astype(str)), ["arrays.npz", "critical_sigma holds"]),
        (lambda f: (f / "vocab.json").write_text("[1, 2]"), ["vocab.json"]),
    ],
)
def test_damaged_arrays_and_vocab_give_one_sentence(sweep_folder, damage, words):
    damage(sweep_folder)
    with pytest.raises(ChunkscopeError) as info:
        read_sweep(sweep_folder)
    message = _one_sentence(info.value, *words)
    assert "pickle" not in message.replace(str(sweep_folder), "").lower()


def _replace_array(folder, key, change):
    with np.load(folder / "arrays.npz") as npz:
        arrays = {k: npz[k] for k in npz.files}
    arrays[key] = change(arrays[key])
    np.savez(folder / "arrays.npz", **arrays)


@pytest.fixture()
def comparison_folder(tokenizer, fixture_text, tmp_path):
    a = LookupCodec(tokenizer)
    b = LookupCodec(tokenizer, seed=1)
    b.name = "other"
    return compare_codecs([a, b], fixture_text, sigmas=GRID, repeats=1).write(tmp_path / "cmp")


@pytest.mark.parametrize(
    "change,words",
    [
        (lambda d: {}, ["compare.json", '"settings" entry is missing']),
        (lambda d: {**d, "tolerances": 3}, ["compare.json", '"tolerances" entry is a number']),
        (lambda d: {**d, "tolerances": [{"name": "x"}]}, ["compare.json", "tolerances"]),
        (lambda d: {**d, "paired": [{"rows": [{"sigma": 0}]}]}, ["compare.json", "paired"]),
        (lambda d: {**d, "main_noise": "loud"}, ["compare.json", "'loud'"]),
        (lambda d: {**d, "settings": {**d["settings"], "checkpoints": [{"name": "../../etc"}, {"name": "b"}]}}, ["compare.json"]),
    ],
)
def test_damaged_compare_json_gives_one_sentence(comparison_folder, change, words):
    _edit_json(comparison_folder / "compare.json", change)
    with pytest.raises(Exception) as info:
        read_comparison(comparison_folder)
    _one_sentence(info.value, str(comparison_folder), *words)


def test_a_damaged_sweep_inside_a_comparison_names_its_folder(comparison_folder):
    inner = comparison_folder / "sweeps" / "isotropic" / "other" / "sweep.json"
    inner.write_text('{"settings": 5}')
    with pytest.raises(ChunkscopeError) as info:
        read_comparison(comparison_folder)
    _one_sentence(info.value, "sweeps/isotropic/other/sweep.json")


def test_a_damaged_workspace_names_the_workspace_not_its_unpacked_copy(lookup_codec, fixture_text, tmp_path):
    result = run_sweep(lookup_codec, chunk_text(fixture_text, lookup_codec), SweepSettings(sigmas=GRID, repeats=1))
    path = save_workspace(Workspace(text="t", sweeps={"s": result}), tmp_path / "w.chunkscope")
    broken = tmp_path / "broken.chunkscope"
    with zipfile.ZipFile(path) as src, zipfile.ZipFile(broken, "w") as dst:
        for item in src.namelist():
            data = src.read(item)
            if item.endswith("sweep.json"):
                data = b'{"provenance": 1}'
            dst.writestr(item, data)
    with pytest.raises(ChunkscopeError) as info:
        load_workspace(broken)
    message = _one_sentence(info.value, str(broken), "sweep.json")
    assert ".workspace-" not in message  # the temporary folder it was unpacked into is never named


@pytest.mark.parametrize(
    "manifest,words",
    [
        ([1, 2], "a list, not an object"),
        ({"format": 1, "sweeps": ["a"]}, "sweeps"),
        ({"format": 1, "trend_points": [{"nonsense": 1}]}, "training-run points"),
        ({"format": "one"}, "format"),
        ({"format": 1, "sweeps": {"s": "../../outside"}}, "outside the workspace"),
    ],
)
def test_damaged_workspace_manifest_gives_one_sentence(tmp_path, manifest, words):
    path = tmp_path / "m.chunkscope"
    with zipfile.ZipFile(path, "w") as archive:
        archive.writestr("workspace.json", json.dumps(manifest))
        archive.writestr("text.txt", "t")
    with pytest.raises(ChunkscopeError) as info:
        load_workspace(path)
    _one_sentence(info.value, str(path), "workspace.json", words)
