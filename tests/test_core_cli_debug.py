"""`--debug`: on an error the one sentence comes first, then the full traceback, down into
the user's own adapter code; without it, the sentence alone (issue 10, "Bad input")."""

from __future__ import annotations

import pytest

from core.cli import main
from tests.test_core_adapter import TEXT, one_sentence, write_user_model

FAILING = "def helper(path):\n    raise KeyError('enc.0.weight')\n\n\ndef load(path):\n    return helper(path)\n"


@pytest.fixture()
def failing_adapter(tmp_path, tokenizer):
    _, checkpoint = write_user_model(tmp_path / "run", tokenizer)
    adapter = tmp_path / "failing.py"
    adapter.write_text(FAILING, encoding="utf-8")
    text = tmp_path / "notes.txt"
    text.write_text(TEXT, encoding="utf-8")
    return checkpoint, adapter, text


def run(capsys, argv):
    code = main(argv)
    return code, capsys.readouterr().err


def test_without_debug_an_error_is_one_sentence(failing_adapter, capsys):
    checkpoint, adapter, text = failing_adapter
    code, err = run(capsys, ["info", str(checkpoint), "--adapter", str(adapter), "--text", str(text)])
    lines = [line for line in err.splitlines() if line.strip()]
    assert code == 2 and len(lines) == 2  # the line naming the code it runs, then the error
    assert lines[0].startswith("chunkscope: running the adapter code in")
    one_sentence(lines[1], str(adapter), "KeyError")


@pytest.mark.parametrize("where", ["before", "after"])
def test_debug_adds_the_full_traceback_into_the_adapters_own_code(failing_adapter, capsys, where):
    checkpoint, adapter, text = failing_adapter
    command = ["sweep", str(checkpoint), "--adapter", str(adapter), "--text", str(text), "--out", "unused", "--quiet"]
    argv = ["--debug", *command] if where == "before" else [*command, "--debug"]
    code, err = run(capsys, argv)
    assert code == 2
    sentence, _, rest = err.partition("Traceback")
    assert "could not open" in sentence.splitlines()[-1]  # the sentence comes first, unchanged
    # the user's frames: their file, the line of `raise` (line 2) and of the call in load (line 6)
    assert f'File "{adapter}", line 2, in helper' in rest and f'File "{adapter}", line 6, in load' in rest
    assert "KeyError: 'enc.0.weight'" in rest
    assert rest.rstrip().splitlines()[-1].startswith("core.codecs.adapter.AdapterError:")


def test_debug_with_a_plain_error(tmp_path, capsys):
    missing = tmp_path / "nowhere.safetensors"
    code, err = run(capsys, ["info", str(missing), "--debug"])
    assert code == 2
    assert err.splitlines()[0].startswith("chunkscope: ") and missing.name in err.splitlines()[0]
    assert "Traceback (most recent call last)" in err
