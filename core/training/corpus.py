"""The training corpus: docstrings and comments of the local Python standard library, with its
language reference prose and a table of the non-ASCII characters of ordinary prose.

Every machine with Python has it, so the sample models can be rebuilt offline; nothing
is ever downloaded. Different Python versions give slightly different corpora, which is
why the corpus hash and the Python version travel in every card.

Rules (also returned in `CorpusInfo.rule`):
- files: every `*.py` under `sysconfig.get_paths()["stdlib"]`, sorted by relative path,
  skipping any directory named in `SKIP_DIRS` (third-party packages, test suites, the
  IDLE and 2to3 sources, vendored pip wheels) and files over 1 MB;
- text of a file: its module, class and function docstrings in `ast.walk` order (as
  `inspect.cleandoc` leaves them), then its comments in source order with the leading
  `#` and one space removed, shebang and coding lines dropped; each piece ends with a
  newline and files are joined with one blank line;
- split: a file is held out when `int(sha256(relative posix path), 16) % 10 == 0`;
- prose (training split only, so the held-out split stays docstrings and comments): the
  values of `pydoc_data/topics.py`'s `topics` dict, the language reference's English text,
  in sorted key order (read with `ast`, never imported);
- characters (training split only): a table of the characters in `CHARACTER_RANGES`, one
  line each, `<char> <its unicodedata name in lower case>`, repeated `CHARACTER_TABLE_REPEATS`
  times, so the accented letters, dashes, quotes and symbols of ordinary prose occur often
  enough to be learnt (the tokenizer gives each a whole-character token: see train.py).
"""

from __future__ import annotations

import ast
import hashlib
import inspect
import io
import sys
import sysconfig
import tokenize
import unicodedata
from dataclasses import asdict, dataclass
from pathlib import Path

SKIP_DIRS = frozenset(
    {"site-packages", "dist-packages", "test", "tests", "idle_test", "idlelib", "lib2to3", "ensurepip", "__pycache__"}
)
MAX_FILE_BYTES = 1_000_000
HELD_OUT_MODULUS = 10
SPLIT_RULE = "held-out if int(sha256(relative path).hexdigest(), 16) % 10 == 0, else train"
FILE_RULE = (
    "*.py under sysconfig stdlib, sorted by relative path, skipping directories named "
    + ", ".join(sorted(SKIP_DIRS))
    + f" and files over {MAX_FILE_BYTES} bytes; docstrings (ast) then comments (tokenize)"
)


TOPICS_FILE = "pydoc_data/topics.py"
# Latin-1 letters and symbols, Latin Extended-A, Greek letters, dashes/quotes/ellipsis/primes, the euro
# sign, minus and the two inequalities: the non-ASCII characters of ordinary European prose
CHARACTER_RANGES = ((0x00A1, 0x00AC), (0x00AE, 0x00FF), (0x0100, 0x017F), (0x0391, 0x03A9), (0x03B1, 0x03C9),
                    (0x2010, 0x2027), (0x2030, 0x203A), (0x20AC, 0x20AC), (0x2212, 0x2212), (0x2264, 0x2265))
CHARACTER_TABLE_REPEATS = 40
PROSE_RULE = (f"training split also holds the values of {TOPICS_FILE}'s topics dict (sorted keys) and a "
              f"character table (unicodedata names) of {len(CHARACTER_RANGES)} ranges, {CHARACTER_TABLE_REPEATS} times")


def character_table() -> str:
    """One line per character of CHARACTER_RANGES that has a name: the character, a space, its name."""
    lines = []
    for low, high in CHARACTER_RANGES:
        for code in range(low, high + 1):
            name = unicodedata.name(chr(code), "")
            if name:
                lines.append(f"{chr(code)} {name.lower()}\n")
    return "".join(lines)


def topics_texts(root: Path) -> list[str]:
    """The reference topics' texts, in sorted key order; empty when the file is missing or unreadable."""
    path = root / TOPICS_FILE
    try:
        tree = ast.parse(path.read_text(encoding="utf-8"))
    except (OSError, UnicodeDecodeError, SyntaxError, ValueError):
        return []
    for node in tree.body:
        if isinstance(node, ast.Assign) and any(getattr(t, "id", "") == "topics" for t in node.targets):
            try:
                topics = ast.literal_eval(node.value)
            except ValueError:
                return []
            return [str(topics[key]).strip() + "\n" for key in sorted(topics) if str(topics[key]).strip()]
    return []


@dataclass(frozen=True)
class CorpusInfo:
    python_version: str
    stdlib_path: str
    rule: str
    split_rule: str
    train_files: int
    held_out_files: int
    train_characters: int
    held_out_characters: int
    train_sha256: str
    held_out_sha256: str

    def to_dict(self) -> dict:
        return asdict(self)


@dataclass(frozen=True)
class Corpus:
    train: list[str]
    held_out: list[str]
    info: CorpusInfo

    @property
    def train_text(self) -> str:
        return "\n".join(self.train)

    @property
    def held_out_text(self) -> str:
        return "\n".join(self.held_out)


def is_held_out(relative_path: str) -> bool:
    return int(hashlib.sha256(relative_path.encode("utf-8")).hexdigest(), 16) % HELD_OUT_MODULUS == 0


def stdlib_files(root: Path) -> list[Path]:
    files = []
    for path in root.rglob("*.py"):
        rel = path.relative_to(root)
        if any(part in SKIP_DIRS for part in rel.parts[:-1]):
            continue
        try:
            if not path.is_file() or path.stat().st_size > MAX_FILE_BYTES:
                continue
        except OSError:
            continue
        files.append(path)
    return sorted(files, key=lambda p: p.relative_to(root).as_posix())


def _docstrings(source: str) -> list[str]:
    try:
        tree = ast.parse(source)
    except (SyntaxError, ValueError):
        return []
    found = []
    for node in ast.walk(tree):
        if isinstance(node, (ast.Module, ast.ClassDef, ast.FunctionDef, ast.AsyncFunctionDef)):
            doc = ast.get_docstring(node, clean=False)
            if doc:
                doc = inspect.cleandoc(doc)
                if doc.strip():
                    found.append(doc)
    return found


def _comments(source: str) -> list[str]:
    found = []
    try:
        for tok in tokenize.generate_tokens(io.StringIO(source).readline):
            if tok.type != tokenize.COMMENT:
                continue
            if tok.start[0] <= 2 and (tok.string.startswith("#!") or "coding" in tok.string):
                continue
            body = tok.string[1:]
            body = body[1:] if body.startswith(" ") else body
            if body.strip():
                found.append(body.rstrip())
    except (tokenize.TokenError, IndentationError, SyntaxError):
        pass
    return found


def file_text(source: str) -> str:
    """The corpus text one source file contributes (possibly empty)."""
    pieces = _docstrings(source) + _comments(source)
    return "".join(piece + "\n" for piece in pieces)


def _sha256(texts: list[str]) -> str:
    return hashlib.sha256("\n".join(texts).encode("utf-8")).hexdigest()


def build_corpus(stdlib_path: str | None = None) -> Corpus:
    """Extract the train and held-out texts; deterministic for a given Python install."""
    root = Path(stdlib_path or sysconfig.get_paths()["stdlib"])
    if not root.is_dir():
        raise FileNotFoundError(f"the standard library folder {root} does not exist")
    train: list[str] = []
    held_out: list[str] = []
    for path in stdlib_files(root):
        rel = path.relative_to(root).as_posix()
        try:
            source = path.read_text(encoding="utf-8")
        except (OSError, UnicodeDecodeError):
            continue
        text = file_text(source)
        if not text:
            continue
        (held_out if is_held_out(rel) else train).append(text)
    train_files = len(train)
    prose = topics_texts(root)
    train.extend(prose)
    train.extend([character_table()] * CHARACTER_TABLE_REPEATS)
    info = CorpusInfo(
        python_version=sys.version.split()[0],
        stdlib_path=str(root),
        rule=FILE_RULE + "; " + PROSE_RULE + f" ({len(prose)} topics found)",
        split_rule=SPLIT_RULE,
        train_files=train_files,
        held_out_files=len(held_out),
        train_characters=sum(len(t) for t in train),
        held_out_characters=sum(len(t) for t in held_out),
        train_sha256=_sha256(train),
        held_out_sha256=_sha256(held_out),
    )
    return Corpus(train=train, held_out=held_out, info=info)
