"""What is loaded: checkpoints, the evaluation text, and per checkpoint its encoding,
latent health and last sweep. Heavy work runs in Tasks; results arrive by signal and a
result made for an older text is dropped."""

from __future__ import annotations

import os
from dataclasses import dataclass, field
from pathlib import Path

from PySide6.QtCore import QObject, Signal

from core.codecs.checkpoint import CheckpointInfo, read_checkpoint_info
from core.codecs.contract import OpenedCodec
from core.codecs.onnx import MANIFEST, is_onnx_codec
from core.codecs.open import open_codec
from core.errors import CheckpointError, ChunkscopeError, TextError
from core.engine.health import LatentHealth, latent_health
from core.engine.noise import Encoded, encode_chunks
from core.engine.cluster import SweepJob, Where, run_sweeps
from core.engine.sweep import SweepResult, SweepSettings, run_sweep
from core.engine.text import DEMO_TEXT_PATH, Chunks, check_text, chunk_text, load_text, text_sha256

from app.adapters import changed_since
from app.workers import Runner, Task

SAMPLES_ENV = "CHUNKSCOPE_SAMPLES"
DEFAULT_SAMPLES = Path(__file__).resolve().parent.parent / "sample_models"


def samples_folder() -> Path:
    """Where the bundled checkpoints live; $CHUNKSCOPE_SAMPLES overrides it."""
    return Path(os.environ.get(SAMPLES_ENV) or DEFAULT_SAMPLES)


def sample_paths(folder: Path | None = None) -> list[Path]:
    folder = folder or samples_folder()
    return sorted(folder.glob("*.safetensors"), key=lambda p: p.stem) if folder.is_dir() else []


def default_text_path(folder: Path | None = None) -> Path:
    folder = folder or samples_folder()
    local = folder / "demo_text.txt"
    return local if local.is_file() else DEMO_TEXT_PATH


@dataclass
class Entry:
    """One opened checkpoint and what has been computed for it on the current text."""

    path: str
    codec: OpenedCodec | None = None
    info: CheckpointInfo | None = None  # the header, read at once when opened (the weights load in a task)
    error: str = ""
    adapter: str = ""  # the adapter file the user allowed to open this checkpoint ("" when none)
    adapter_sha256: str = ""  # its sha256 when allowed: the worker refuses a file changed since
    text_sha: str = ""
    chunks: Chunks | None = None
    encoded: Encoded | None = None
    health: LatentHealth | None = None
    sweep: SweepResult | None = None
    busy: set[str] = field(default_factory=set)

    @property
    def name(self) -> str:
        return Path(self.path).stem

    @property
    def ready(self) -> bool:
        return self.codec is not None and self.encoded is not None


def _load_and_encode(task: Task, path: str, text: str, source: str, adapter: str = "", adapter_sha: str = ""):
    if adapter and changed_since(adapter, adapter_sha):
        raise ChunkscopeError(f"The adapter {adapter} changed after you allowed it to run; open the checkpoint with it "
                              "again to be asked about the new file.")
    codec = open_codec(path, adapter or None)
    if task.should_stop():
        return None
    chunks = chunk_text(text, codec, source)
    encoded = encode_chunks(codec, chunks, should_stop=task.should_stop)
    return codec, chunks, encoded


def _encode(task: Task, codec: OpenedCodec, text: str, source: str):
    chunks = chunk_text(text, codec, source)
    return chunks, encode_chunks(codec, chunks, should_stop=task.should_stop)


def _health(task: Task, codec: OpenedCodec, chunks: Chunks, encoded: Encoded):
    return latent_health(codec, chunks, encoded=encoded, should_stop=task.should_stop)


def _sweep(task: Task, codec: OpenedCodec, chunks: Chunks, encoded: Encoded, settings: SweepSettings, source: str,
           where: Where = Where()):
    if not where.here:  # shards on a Dask cluster (the "Run on" setting); progress counts shards
        (result,) = run_sweeps([SweepJob(codec, chunks, settings, source, encoded)], where, progress=task.report,
                               should_stop=task.should_stop)
        return result
    return run_sweep(codec, chunks, settings, progress=task.report, should_stop=task.should_stop,
                     encoded=encoded, text_source=source)


class Workbench(QObject):
    entries_changed = Signal()  # an entry was added or removed
    entry_changed = Signal(str)  # path: its codec, encoding, health or sweep changed
    current_changed = Signal(str)
    text_changed = Signal()
    sweep_progress = Signal(str, int, int)
    sweep_ended = Signal(str, str)  # path, "done" | "cancelled" | error message
    error = Signal(str)
    opened = Signal(str)  # path: the checkpoint's weights loaded
    open_failed = Signal(str)  # path: the checkpoint could not be opened
    where_of = Where  # where sweeps run: app/run_on.py points this at the window's setting

    def __init__(self, runner: Runner, parent: QObject | None = None):
        super().__init__(parent)
        self.runner = runner
        self.entries: dict[str, Entry] = {}
        self.current: str = ""
        self.text: str = ""
        self.text_source: str = ""
        self.text_sha: str = ""
        self._sweep_tasks: dict[str, Task] = {}

    # ---- text ----------------------------------------------------------------------------

    def set_text(self, text: str, source: str) -> bool:
        """Validate and use a new evaluation text; False (and an error message) if unusable."""
        try:
            check_text(text, source)
        except TextError as exc:
            self.error.emit(str(exc))
            return False
        self.text, self.text_source, self.text_sha = text, source, text_sha256(text)
        for task in self._sweep_tasks.values():
            task.cancel()
        for entry in self.entries.values():
            entry.chunks = entry.encoded = entry.health = entry.sweep = None
            entry.text_sha = ""
            if entry.codec is not None:
                self._start_encode(entry)
        self.text_changed.emit()
        return True

    def open_text_file(self, path: str) -> bool:
        try:
            text = load_text(path)
        except TextError as exc:
            self.error.emit(str(exc))
            return False
        return self.set_text(text, Path(path).name)

    # ---- checkpoints ---------------------------------------------------------------------

    def open_checkpoint(self, path: str | os.PathLike, select: bool = True, adapter: str = "", adapter_sha256: str = "") -> None:
        """Open a built-in checkpoint or an ONNX codec folder (or its codec.json); with `adapter`,
        through that adapter, whose code the caller made sure the user allowed to run."""
        path = self.checkpoint_key(path)
        if path in self.entries and self.entries[path].codec is not None and self.entries[path].adapter == adapter:
            if select:
                self.select(path)
            return
        entry = self.entries.get(path) or Entry(path=path)
        entry.error = ""
        entry.adapter, entry.adapter_sha256 = adapter, adapter_sha256
        entry.codec = None
        entry.info = None  # the loading task says what is wrong, in the same words
        if not adapter and not is_onnx_codec(path):
            try:
                entry.info = read_checkpoint_info(path)
            except CheckpointError:
                pass
        self.entries[path] = entry
        entry.busy.add("load")
        task = Task(f"opening {Path(path).name}", _load_and_encode, path, self.text, self.text_source, adapter, adapter_sha256)
        sha = self.text_sha
        task.finished.connect(lambda result, p=path, s=sha: self._loaded(p, s, result))
        task.failed.connect(lambda message, p=path: self._load_failed(p, message))
        self.entries_changed.emit()
        if select and (not self.current or self.current not in self.entries or self.entries[self.current].codec is None):
            self.current = path
            self.current_changed.emit(path)
        self.runner.start(task)

    @staticmethod
    def checkpoint_key(path: str | os.PathLike) -> str:
        """The entry's path: resolved, and an ONNX codec's folder rather than its codec.json."""
        resolved = Path(path).resolve()
        if resolved.name == MANIFEST and resolved.is_file():
            resolved = resolved.parent
        return str(resolved)

    def _loaded(self, path: str, sha: str, result) -> None:
        entry = self.entries.get(path)
        if entry is None:
            return
        entry.busy.discard("load")
        codec, chunks, encoded = result
        entry.codec = codec
        if sha == self.text_sha:
            entry.chunks, entry.encoded, entry.text_sha = chunks, encoded, sha
            self._start_health(entry)
        else:
            self._start_encode(entry)
        if self.entries.get(self.current) is None:
            self.current = path
        self.opened.emit(path)
        self.entry_changed.emit(path)
        if path == self.current:
            self.current_changed.emit(path)

    def _load_failed(self, path: str, message: str) -> None:
        self.entries.pop(path, None)
        if self.current == path:
            ready = [p for p, e in self.entries.items() if e.codec is not None]
            self.current = ready[0] if ready else ""
            self.current_changed.emit(self.current)
        self.entries_changed.emit()
        self.open_failed.emit(path)
        self.error.emit(message)

    def close_checkpoint(self, path: str) -> None:
        task = self._sweep_tasks.pop(path, None)
        if task:
            task.cancel()
        self.entries.pop(path, None)
        if self.current == path:
            self.current = next(iter(self.entries), "")
            self.current_changed.emit(self.current)
        self.entries_changed.emit()

    def select(self, path: str) -> None:
        if path in self.entries and path != self.current:
            self.current = path
            self.current_changed.emit(path)

    def entry(self, path: str | None = None) -> Entry | None:
        return self.entries.get(self.current if path is None else path)

    # ---- derived work --------------------------------------------------------------------

    def _start_for_text(self, entry: Entry, kind: str, title: str, fn, *args, apply) -> None:
        """Run `fn` for an entry on the current text; its result is dropped if the entry was
        closed or the text changed meanwhile, else `apply(entry, result)` stores it."""
        entry.busy.add(kind)
        sha = self.text_sha
        task = Task(title, fn, *args)
        task.finished.connect(lambda result, p=entry.path, s=sha: self._done_for_text(p, s, kind, result, apply))
        task.failed.connect(self.error)
        self.runner.start(task)

    def _done_for_text(self, path: str, sha: str, kind: str, result, apply) -> None:
        entry = self.entries.get(path)
        if entry is None or sha != self.text_sha:
            return
        entry.busy.discard(kind)
        apply(entry, result)
        self.entry_changed.emit(path)

    def _start_encode(self, entry: Entry) -> None:
        self._start_for_text(entry, "encode", f"encoding the text with {entry.name}", _encode, entry.codec, self.text,
                             self.text_source, apply=self._encoded)

    def _encoded(self, entry: Entry, result) -> None:
        entry.chunks, entry.encoded = result
        entry.text_sha = self.text_sha
        self._start_health(entry)

    def _start_health(self, entry: Entry) -> None:
        self._start_for_text(entry, "health", f"measuring the latent health of {entry.name}", _health, entry.codec,
                             entry.chunks, entry.encoded, apply=self._healthy)

    @staticmethod
    def _healthy(entry: Entry, result) -> None:
        entry.health = result

    # ---- sweeps --------------------------------------------------------------------------

    def sweeping(self, path: str | None = None) -> bool:
        return (self.current if path is None else path) in self._sweep_tasks

    def start_sweep(self, settings: SweepSettings, path: str | None = None) -> bool:
        path = self.current if path is None else path
        entry = self.entries.get(path)
        if entry is None or not entry.ready:
            self.error.emit("the checkpoint is still loading; run the sweep when it is ready.")
            return False
        if path in self._sweep_tasks:
            return False
        try:
            settings = settings.validated(entry.codec)
        except Exception as exc:
            self.error.emit(str(exc))
            return False
        sha = self.text_sha
        task = Task(f"the sweep of {entry.name}", _sweep, entry.codec, entry.chunks, entry.encoded, settings, self.text_source,
                    self.where_of())
        task.progress.connect(lambda done, total, p=path: self.sweep_progress.emit(p, done, total))
        task.finished.connect(lambda result, p=path, s=sha: self._swept(p, s, result))
        task.failed.connect(lambda message, p=path: self._sweep_over(p, message))
        task.cancelled.connect(lambda p=path: self._sweep_over(p, "cancelled"))
        self._sweep_tasks[path] = task
        self.runner.start(task)
        return True

    def cancel_sweep(self, path: str | None = None) -> None:
        task = self._sweep_tasks.get(self.current if path is None else path)
        if task is not None:
            task.cancel()

    def _swept(self, path: str, sha: str, result: SweepResult) -> None:
        self._sweep_tasks.pop(path, None)
        entry = self.entries.get(path)
        if entry is None or sha != self.text_sha:
            self.sweep_ended.emit(path, "cancelled")
            return
        entry.sweep = result
        self.entry_changed.emit(path)
        self.sweep_ended.emit(path, "done")

    def attach_sweep(self, result: SweepResult) -> str | None:
        """Give a saved sweep to the opened checkpoint it was made with (same sha256) when
        the current text is the one it was made on; the path it went to, or None."""
        sha = result.provenance.get("codec", {}).get("sha256", "")
        if not sha or result.chunks.text_sha256 != self.text_sha:
            return None
        for path, entry in self.entries.items():
            if entry.codec is not None and entry.codec.sha256 == sha and path not in self._sweep_tasks:
                if entry.sweep is result:
                    return path
                entry.sweep = result
                self.entry_changed.emit(path)
                return path
        return None

    def _sweep_over(self, path: str, how: str) -> None:
        self._sweep_tasks.pop(path, None)
        self.sweep_ended.emit(path, how)
