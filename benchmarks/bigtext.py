"""A large benchmark text made at run time from what every machine has (never committed):
this Python's standard-library docstrings and comments (the training corpus's own code),
the licence texts under /usr/share/common-licenses and the copyright files of installed
packages under /usr/share/doc, concatenated in a fixed order and repeated to the size asked."""

from __future__ import annotations

from pathlib import Path


def _system_texts() -> list[str]:
    texts = []
    for folder, pattern in ((Path("/usr/share/common-licenses"), "*"), (Path("/usr/share/doc"), "*/copyright")):
        if not folder.is_dir():
            continue
        for path in sorted(folder.glob(pattern)):
            try:
                if path.is_file() and path.stat().st_size < 1_000_000:
                    texts.append(path.read_text(encoding="utf-8"))
            except (OSError, UnicodeDecodeError):
                continue
    return texts


def benchmark_text(megabytes: float) -> str:
    """About `megabytes` MB of UTF-8 text (whole pieces, so a little more)."""
    from core.training.corpus import build_corpus

    corpus = build_corpus()
    pieces = corpus.held_out + corpus.train + _system_texts()
    target = int(megabytes * 1_000_000)
    out, size = [], 0
    while size < target:
        for piece in pieces:
            out.append(piece)
            size += len(piece.encode("utf-8")) + 1
            if size >= target:
                break
    return "\n".join(out)


def write_benchmark_text(path: str | Path, megabytes: float) -> Path:
    path = Path(path)
    path.write_text(benchmark_text(megabytes), encoding="utf-8")
    return path


if __name__ == "__main__":
    import sys

    sys.path.insert(0, str(Path(__file__).resolve().parent.parent))
    target = Path(sys.argv[1])
    write_benchmark_text(target, float(sys.argv[2]) if len(sys.argv) > 2 else 20)
    print(target, target.stat().st_size)
