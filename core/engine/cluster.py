"""Where heavy work runs: this process, a local Dask cluster of N processes, or a running scheduler.

A sweep is cut into shards (`plan_sweep` / `sweep_shard` / `merge_shards` in core.engine.sweep).
When its plan needs the text's latent scale (data-scale noise), the encoding pass that measures
it runs as tasks first (`scale_parts` per ENCODE_BATCH block; the client adds the parts in block
order, so the plan is plan_sweep's exactly). The client then plans the sweep, submits its shards
as tasks, and folds the shards into one result as they finish, so it holds no more than the
merged result. `run_worst_case` shards worstcase the same way. A task carries a
ticket, not a codec: the checkpoint's path and sha256, and an adapter's file (its bytes).
The worker opens the codec itself (once per process, kept in a small cache), checks the
sha256 and sweeps its range. Dask's `retries=` recompute a shard whose worker died or
raised; a shard that fails on every try is one sentence naming its checkpoint, and then
nothing is written. `distributed` is imported only when a cluster is asked for.
"""

from __future__ import annotations

import hashlib
import math
import os
import tempfile
import time
from collections import OrderedDict
from contextlib import contextmanager
from dataclasses import dataclass, field
from pathlib import Path
from typing import Any, Callable, Iterator, Sequence

import numpy as np

from core.errors import ChunkscopeError, SettingsError, SweepCancelled

INSTALL_HINT = "pip install chunkscope[cluster]"
DEFAULT_RETRIES = 2  # a shard runs up to 3 times before its sweep fails
SHARDS_PER_THREAD = 4  # enough shards that a slow or restarted worker does not hold up the rest
CODECS_PER_WORKER = 4  # opened codecs a worker process keeps for its next shards
CONNECT_TIMEOUT_S = 10


class ClusterError(ChunkscopeError):
    """Work on a cluster cannot start, or one of its shards failed on every try."""


def need_distributed():
    """Dask's distributed package, or one sentence saying what to install."""
    try:
        import distributed
    except ImportError:
        raise ClusterError(f"running on a cluster needs Dask's distributed package: {INSTALL_HINT}.") from None
    return distributed


@dataclass(frozen=True)
class Where:
    """Where heavy work runs: here (the default), `workers` local processes, or a scheduler `address`."""

    workers: int = 0
    address: str = ""
    retries: int = DEFAULT_RETRIES

    @property
    def here(self) -> bool:
        return not self.workers and not self.address

    def validated(self) -> "Where":
        if self.workers and self.address:
            raise SettingsError("work runs on a local cluster (--workers) or at a scheduler's address (--cluster), not both.")
        if isinstance(self.workers, bool) or not isinstance(self.workers, int) or self.workers < 0:
            raise SettingsError(f"the number of workers must be a whole number >= 1, not {self.workers!r}.")
        address = self.address.strip()
        if address and "://" not in address and ":" not in address:
            raise SettingsError(f"a scheduler's address looks like tcp://HOST:8786, not {address!r}.")
        if not isinstance(self.retries, int) or self.retries < 0:
            raise SettingsError(f"retries must be a whole number >= 0, not {self.retries!r}.")
        if not self.here:
            need_distributed()
        return Where(self.workers, address, self.retries)

    def label(self) -> str:
        if self.address:
            return f"the Dask scheduler at {self.address}"
        if self.workers:
            return f"a local Dask cluster of {self.workers} process{'es' if self.workers != 1 else ''}"
        return "this process"


@contextmanager
def cluster_client(where: Where) -> Iterator[Any]:
    """A distributed.Client for `where`; afterwards a local cluster is shut down and a scheduler
    at an address is left running as it was (only this client disconnects)."""
    distributed = need_distributed()
    import logging

    if where.address:
        try:
            client = distributed.Client(where.address, timeout=f"{CONNECT_TIMEOUT_S}s", set_as_default=False)
        except (OSError, TimeoutError, ValueError) as exc:
            raise ClusterError(f"no Dask scheduler answered at {where.address} within {CONNECT_TIMEOUT_S} s ({exc}).") from None
        try:
            yield client
        finally:
            client.close()
        return
    import signal
    import threading

    # Ctrl-C in a terminal reaches the whole process group: the worker processes start with it
    # ignored (an ignored signal stays ignored in a child), so only this process stops, and cancels them.
    main = threading.current_thread() is threading.main_thread()
    previous = signal.signal(signal.SIGINT, signal.SIG_IGN) if main else None
    try:
        import dask

        # Dask's sampling profiler walks each worker's task stack every 10 ms, holding the interpreter
        # lock; in a local cluster of our own nobody reads it, and turning it off measured 1.39x -> 1.49x
        # (benchmarks/bench_cluster.py, 2 workers, quiet machine). A user's own scheduler keeps its settings.
        with dask.config.set({"distributed.worker.profile.enabled": False}):
            cluster = distributed.LocalCluster(
                n_workers=where.workers, threads_per_worker=1, processes=True, dashboard_address=":0",
                silence_logs=logging.ERROR,
            )
    finally:
        if main:
            signal.signal(signal.SIGINT, previous)
    try:
        client = distributed.Client(cluster, set_as_default=False)
        try:
            yield client
        finally:
            client.close()
    finally:
        cluster.close()


# ---- what travels with a task, and how a worker opens it ----------------------------------------


@dataclass(frozen=True)
class AdapterTicket:
    """An adapter as a task carries it: its file's bytes (or an installed entry point's name)."""

    label: str  # what the user named (--adapter), for messages
    function: str = "load"
    file_name: str = ""
    source: bytes = b""
    sha256: str = ""
    entry_point: str = ""


@dataclass(frozen=True)
class CodecTicket:
    """What a worker needs to open a shard's codec itself."""

    path: str  # absolute; workers of a remote cluster must see it at the same path
    sha256: str
    adapter: AdapterTicket | None = None


def codec_ticket(codec, adapter: str | None = None) -> CodecTicket:
    """The ticket of a codec the client opened (through `adapter` when it was opened with one)."""
    from core.codecs.contract import opened

    codec = opened(codec)
    if not codec.path:
        raise ClusterError(f"{codec.name} was not opened from a file, so the cluster's workers cannot open it.")
    ticket_adapter = None
    if codec.source.opened_as == "adapter":
        if not adapter:  # the adapter recorded when it was opened (its load function, unless FILE.py:FUNC was named)
            adapter = codec.source.adapter.removeprefix("entry point ")
        if not adapter:
            raise ClusterError(f"{codec.path} was opened through an adapter, but none was named for the workers.")
        from core.codecs.adapter import parse_spec

        spec = parse_spec(adapter)
        if spec.entry_point:
            ticket_adapter = AdapterTicket(label=spec.label, entry_point=spec.entry_point)
        else:
            try:
                source = spec.file.read_bytes()
            except OSError as exc:
                raise ClusterError(f"the adapter {spec.text} cannot be read: {exc.strerror or exc}.") from None
            allowed = codec.source.adapter_sha256  # the code that opened it here; workers run only that code
            if allowed and Path(codec.source.adapter) == spec.file.absolute() and hashlib.sha256(source).hexdigest() != allowed:
                raise ClusterError(f"the adapter {spec.text} changed after it opened {codec.path}; open the checkpoint "
                                   "again so the new code is the one that runs.")
            ticket_adapter = AdapterTicket(label=spec.text, function=spec.function, file_name=spec.file.name, source=source,
                                           sha256=hashlib.sha256(source).hexdigest())
    return CodecTicket(os.path.abspath(codec.path), codec.sha256, ticket_adapter)


_OPENED: "OrderedDict[tuple, Any]" = OrderedDict()  # per worker process: the codecs its recent shards opened


_PRIVATE_FOLDER: list[Path] = []  # this worker process's own folder for shipped adapter files


def _adapter_file(ticket: AdapterTicket) -> Path:
    """The adapter's bytes as a file under their sha256, in a folder only this process can write
    (mkdtemp, mode 0700): a shared temporary path could be swapped between the hash check and the import."""
    if not _PRIVATE_FOLDER:
        _PRIVATE_FOLDER.append(Path(tempfile.mkdtemp(prefix="chunkscope-adapters-")))
    folder = _PRIVATE_FOLDER[0] / ticket.sha256
    path = folder / ticket.file_name
    if not path.is_file() or hashlib.sha256(path.read_bytes()).hexdigest() != ticket.sha256:
        folder.mkdir(parents=True, exist_ok=True)
        part = folder / f".{ticket.file_name}.part"
        part.write_bytes(ticket.source)
        os.replace(part, path)
    return path


def open_on_worker(ticket: CodecTicket):
    """Open (or reuse) the ticket's codec in this process and check it is the client's checkpoint."""
    from core.codecs.open import open_codec

    key = (ticket.path, ticket.sha256, ticket.adapter.sha256 if ticket.adapter else "", ticket.adapter.entry_point if ticket.adapter else "")
    if key in _OPENED:
        _OPENED.move_to_end(key)
        return _OPENED[key]
    spec, temp = None, None
    if ticket.adapter is not None:
        if ticket.adapter.entry_point:
            spec = ticket.adapter.entry_point
        else:
            temp = _adapter_file(ticket.adapter)
            spec = f"{temp}:{ticket.adapter.function}"
    try:
        codec = open_codec(ticket.path, spec)
    except ChunkscopeError as exc:
        message = str(exc)
        if temp is not None:
            message = message.replace(f"{temp}:{ticket.adapter.function}", ticket.adapter.label).replace(str(temp), ticket.adapter.label)
        raise ClusterError(message) from None
    if codec.sha256 != ticket.sha256:
        raise ClusterError(
            f"{ticket.path} on this worker has sha256 {codec.sha256[:12]}…, not the {ticket.sha256[:12]}… the client opened "
            "(a different file at the same path)."
        )
    _OPENED[key] = codec
    while len(_OPENED) > CODECS_PER_WORKER:
        _OPENED.popitem(last=False)
    return codec


def _shard_task(ticket: CodecTicket, plan, ids: np.ndarray, start: int, stop: int):
    """One task on a worker: open the codec (cached), sweep chunks start..stop, return the SweepShard."""
    from core.deferred import torch
    from core.engine.sweep import sweep_shard

    if torch.get_num_threads() != 1:  # the cluster's parallelism is its processes: one thread each
        torch.set_num_threads(1)
    codec = open_on_worker(ticket)
    return sweep_shard(codec, ids, plan, start, stop)


def _scale_task(ticket: CodecTicket, ids: np.ndarray, pad_id: int, start: int, stop: int) -> list:
    """One task of a sharded planning pass: Σ mean² per ENCODE_BATCH block of chunks start..stop."""
    from core.deferred import inference_mode, torch
    from core.engine.noise import scale_parts

    if torch.get_num_threads() != 1:
        torch.set_num_threads(1)
    codec = open_on_worker(ticket)
    return inference_mode(scale_parts)(codec, ids, pad_id, start, stop)


# ---- the client's side ----------------------------------------------------------------------------


@dataclass
class SweepJob:
    """One sweep to run: the client's opened codec, its chunks and settings."""

    codec: Any
    chunks: Any
    settings: Any
    text_source: str = ""
    encoded: Any = None  # the whole text's latents, when the caller already has them (for the plan)
    adapter: str | None = None  # the --adapter spec the codec was opened with, if any


class _Fold:
    """The shards of one sweep folded as they arrive: accumulators merged, rows put in place.

    Holds one merged shard, never the shards themselves; `finish` hands it to merge_shards."""

    def __init__(self, plan, ranges: Sequence[tuple[int, int]]):
        self.plan, self.waiting, self.shards = plan, set(ranges), len(ranges)
        self.accumulators = None
        self.wrong_counts = self.decoded = None
        self.sumsq, self.decoded_chunks, self.elapsed = None, 0, 0.0

    def add(self, shard) -> None:
        from core.engine.metrics import SigmaAccumulator

        self.waiting.remove((shard.start_chunk, shard.stop_chunk))
        if self.accumulators is None:
            shape = (self.plan.n_tokens, len(self.plan.settings.sigmas))
            self.accumulators = [SigmaAccumulator.from_state(st) for st in shard.accumulators]
            self.wrong_counts = np.zeros(shape, dtype=shard.wrong_counts.dtype)
            self.decoded = np.zeros(shape, dtype=shard.decoded.dtype)
            self.sumsq = np.zeros_like(shard.latent_sumsq)
        else:
            for acc, st in zip(self.accumulators, shard.accumulators):
                acc.merge(SigmaAccumulator.from_state(st))
        t0 = shard.start_chunk * self.plan.chunk_size
        self.wrong_counts[t0 : t0 + len(shard.wrong_counts)] = shard.wrong_counts
        self.decoded[t0 : t0 + len(shard.decoded)] = shard.decoded
        self.sumsq += shard.latent_sumsq
        self.decoded_chunks += shard.decoded_chunks
        self.elapsed += shard.elapsed_s

    @property
    def complete(self) -> bool:
        return not self.waiting

    def finish(self, job: SweepJob, elapsed_s: float, provenance: dict):
        from core.engine.sweep import SweepShard, merge_shards

        whole = SweepShard(0, self.plan.n_chunks, [acc.state() for acc in self.accumulators], self.wrong_counts, self.decoded,
                           self.sumsq, self.decoded_chunks, self.elapsed)
        result = merge_shards(self.plan, [whole], job.chunks, job.codec, job.text_source, elapsed_s=elapsed_s)
        result.provenance["ran_on"] = {**provenance, "worker_seconds": self.elapsed}
        return result


Progress = Callable[[int, int], None]


def run_sweeps(
    jobs: Sequence[SweepJob],
    where: Where = Where(),
    progress: Progress | None = None,
    should_stop: Callable[[], bool] | None = None,
    on_start: Callable[[Any], None] | None = None,
) -> list:
    """Run every job's sweep where `where` says: SweepResults in the jobs' order.
    Raises SweepCancelled when stopped (nothing is returned; a cluster's futures are cancelled)."""
    results: list = [None] * len(jobs)
    for i, result in sweeps_as_completed(jobs, where, progress, should_stop, on_start):
        results[i] = result
    return results


def sweeps_as_completed(
    jobs: Sequence[SweepJob],
    where: Where = Where(),
    progress: Progress | None = None,
    should_stop: Callable[[], bool] | None = None,
    on_start: Callable[[Any], None] | None = None,
) -> Iterator[tuple[int, Any]]:
    """(job index, SweepResult) as each sweep completes: in order here, in finishing order on a cluster.

    `progress(done, total)` counts shards on a cluster. `on_start(client)` is called once the
    cluster answers. Closing the iterator early cancels what is still running."""
    if where.here:
        return _run_here(jobs, progress, should_stop)
    return _run_on_cluster(jobs, where.validated(), progress, should_stop, on_start)


def _run_here(jobs, progress, should_stop) -> Iterator[tuple[int, Any]]:
    from core.engine.sweep import run_sweep

    scale = 1000
    for i, job in enumerate(jobs):
        report = (lambda d, t, i=i: progress(i * scale + d * scale // max(t, 1), len(jobs) * scale)) if progress else None
        yield i, run_sweep(job.codec, job.chunks, job.settings, progress=report, should_stop=should_stop,
                           encoded=job.encoded, text_source=job.text_source)


def _cause(exc: BaseException) -> str:
    if isinstance(exc, ChunkscopeError):
        return str(exc).rstrip(".")
    name = type(exc).__name__
    if name == "KilledWorker":
        return "every worker that ran it died"
    text = str(exc).strip().splitlines()
    return f"{name}: {text[-1]}" if text else name


def _finished(task_of: dict, pending: set, where: Where, name_of: Callable[[int], str], stopped) -> Iterator[tuple[tuple, Any]]:
    """(task info, value) of each task as it finishes; `pending` may grow between yields. A task that
    failed on every try is one sentence naming its checkpoint (`name_of(job index)`) and chunk range."""
    while pending:
        if stopped():
            raise SweepCancelled()
        finished = [f for f in pending if f.done()]
        if not finished:
            time.sleep(0.02)
            continue
        for future in finished:
            pending.discard(future)
            info = task_of.pop(future)
            _, i, a, b = info
            if future.status != "finished":
                exc = future.exception() if future.status == "error" else None
                cause = _cause(exc) if exc is not None else "it was cancelled on the cluster"
                tries = where.retries + 1
                raise ClusterError(f"{name_of(i)}: the shard of chunks {a}..{b} failed on every try "
                                   f"on the cluster ({tries} tr{'ies' if tries != 1 else 'y'}): {cause}.")
            value = future.result()
            future.release()
            yield info, value


def _submitter(client, where: Where, task_of: dict, pending: set):
    def submit(kind: str, i: int, a: int, b: int, fn, *args) -> None:
        """Job i's tasks run before job i+1's, and a job's shards before the next job's planning pass."""
        future = client.submit(fn, *args, retries=where.retries, pure=False, priority=-2 * i + (kind != "scale"),
                               key=f"chunkscope-{kind}-{i}-{a}-{b}-{os.urandom(4).hex()}")
        task_of[future] = (kind, i, a, b)
        pending.add(future)
    return submit


def _submit_scale(submit, i: int, ticket: CodecTicket, chunks, parts: int) -> int:
    """Job i's planning pass as ENCODE_BATCH-aligned tasks; how many."""
    from core.engine.noise import ENCODE_BATCH
    from core.engine.sweep import chunk_ranges

    k, ranges = chunks.chunk_size, chunk_ranges(chunks.num_chunks, ENCODE_BATCH, parts)
    for a, b in ranges:
        ids = np.ascontiguousarray(chunks.token_ids[a * k : min(b * k, chunks.num_tokens)])
        submit("scale", i, a, b, _scale_task, ticket, ids, chunks.pad_id, a, b)
    return len(ranges)


def _run_on_cluster(jobs, where: Where, progress, should_stop, on_start) -> Iterator[tuple[int, Any]]:
    """Two kinds of task, both sharded: a job whose plan needs the text's latent scale first has its
    planning pass cut into ENCODE_BATCH-aligned ranges (scale_parts); once they are all in, the client
    plans it (parts summed in order: the one-process plan exactly) and submits its sweep shards.
    Priorities keep the jobs in order: job i's tasks run before job i+1's, so folds finish one by one."""
    from core.engine.noise import LatentScale
    from core.engine.sweep import chunk_ranges, plan_needs_scale, plan_sweep

    stopped = should_stop or (lambda: False)
    started = time.perf_counter()
    with cluster_client(where) as client:
        if on_start is not None:
            on_start(client)
        threads = max(1, sum(client.nthreads().values()))
        per_job = max(1, math.ceil(SHARDS_PER_THREAD * threads / max(len(jobs), 1)))
        task_of: dict = {}  # future -> (kind, job index, start, stop)
        folds: list = [None] * len(jobs)
        parts: list = [None] * len(jobs)  # job -> {start: the range's scale parts}, while its planning pass runs
        tickets, total, pending = [], 0, set()
        scale_tasks = [0] * len(jobs)
        submit = _submitter(client, where, task_of, pending)

        def submit_shards(i: int, plan) -> None:
            job, k = jobs[i], plan.chunk_size
            ranges = plan.shard_ranges(per_job)
            folds[i] = _Fold(plan, ranges)
            for a, b in ranges:
                ids = np.ascontiguousarray(job.chunks.token_ids[a * k : min(b * k, plan.n_tokens)])
                submit("shard", i, a, b, _shard_task, tickets[i], plan, ids, a, b)

        try:
            for i, job in enumerate(jobs):
                if stopped():
                    raise SweepCancelled()
                tickets.append(codec_ticket(job.codec, job.adapter))
                n = job.chunks.num_chunks
                batch = job.settings.validated(job.codec).batch_chunks
                total += len(chunk_ranges(n, batch, per_job))
                if plan_needs_scale(job.codec, job.chunks, job.settings, job.encoded) and n:
                    parts[i] = {}
                    scale_tasks[i] = _submit_scale(submit, i, tickets[i], job.chunks, per_job)
                    total += scale_tasks[i]
                else:
                    submit_shards(i, plan_sweep(job.codec, job.chunks, job.settings, encoded=job.encoded))
            done = 0
            if progress is not None:
                progress(0, total)
            for (kind, i, a, b), value in _finished(task_of, pending, where, lambda i: jobs[i].codec.path or jobs[i].codec.name,
                                                    stopped):
                job = jobs[i]
                done += 1
                if kind == "scale":
                    parts[i][a] = value
                    if len(parts[i]) == scale_tasks[i]:
                        ordered = [part for start in sorted(parts[i]) for part in parts[i][start]]
                        parts[i] = None
                        scale = LatentScale.of_parts(ordered, job.chunks.num_chunks)
                        submit_shards(i, plan_sweep(job.codec, job.chunks, job.settings, scale=scale))
                if progress is not None:
                    progress(done, total)
                if kind == "shard":
                    fold = folds[i]
                    fold.add(value)
                    if fold.complete:
                        folds[i] = None
                        yield i, fold.finish(job, time.perf_counter() - started, {
                            "where": where.label(), "shards": fold.shards, "planning_shards": scale_tasks[i]})
        finally:
            if task_of:
                client.cancel(list(task_of), force=True)


# ---- the worst case, sharded ----------------------------------------------------------------------


def _worst_case_task(ticket: CodecTicket, ids: np.ndarray, n_tokens: int, pad_id: int, first: int, start: int, stop: int,
                     data_scale: np.ndarray, settings):
    """One worst-case shard: encode the ENCODE_BATCH blocks holding chunks start..stop as the whole-text
    encode does (`ids` are those blocks' token ids, from chunk `first`), then search start..stop."""
    from core.analyses.worstcase import worst_case_piece
    from core.deferred import torch
    from core.engine.noise import ENCODE_BATCH, encoded_blocks
    from core.engine.text import real_mask

    if torch.get_num_threads() != 1:
        torch.set_num_threads(1)
    codec = open_on_worker(ticket)
    k = codec.chunk_size
    last = min(-(-stop // ENCODE_BATCH) * ENCODE_BATCH, -(-n_tokens // k))
    means = [mean for _, _, mean in encoded_blocks(codec, ids, pad_id, first, last)]
    mean = torch.cat(means)[start - first : stop - first]
    mask = real_mask(start, stop, k, n_tokens)
    return worst_case_piece(codec, mean, mask, torch.from_numpy(data_scale), start, stop, settings)


def run_worst_case(codec, chunks, settings, where: Where, adapter: str | None = None, progress: Progress | None = None,
                   should_stop: Callable[[], bool] | None = None, encoded=None, text_source: str = ""):
    """worst_case sharded over a cluster: the text's r measured in ENCODE_BATCH-aligned pieces (as a sweep's
    plan), then the chunks in ranges of whole `batch_chunks` batches; pieces join into the one-process result."""
    from core.analyses.worstcase import assemble
    from core.engine.noise import ENCODE_BATCH, LatentScale
    from core.engine.sweep import chunk_ranges

    where = where.validated()
    stopped = should_stop or (lambda: False)
    started = time.perf_counter()
    n, k = chunks.num_chunks, chunks.chunk_size
    name = codec.path or codec.name
    with cluster_client(where) as client:
        threads = max(1, sum(client.nthreads().values()))
        ticket = codec_ticket(codec, adapter)
        task_of: dict = {}
        pending: set = set()
        submit = _submitter(client, where, task_of, pending)
        ranges = chunk_ranges(n, settings.batch_chunks, SHARDS_PER_THREAD * threads)
        try:
            if encoded is not None:
                scale, planning = encoded.scale, 0
            else:
                planning = _submit_scale(submit, 0, ticket, chunks, SHARDS_PER_THREAD * threads)
            total, done, parts, pieces = planning + len(ranges), 0, {}, []
            if progress is not None:
                progress(0, total)

            def submit_pieces(data_scale: np.ndarray) -> None:
                for a, b in ranges:
                    first = a - a % ENCODE_BATCH
                    last = min(-(-b // ENCODE_BATCH) * ENCODE_BATCH, n)
                    ids = np.ascontiguousarray(chunks.token_ids[first * k : min(last * k, chunks.num_tokens)])
                    submit("worst", 0, a, b, _worst_case_task, ticket, ids, chunks.num_tokens, chunks.pad_id, first, a, b,
                           data_scale, settings)

            if encoded is not None:
                submit_pieces(encoded.rms_per_dim.numpy())
            for (kind, _, a, _), value in _finished(task_of, pending, where, lambda i: name, stopped):
                done += 1
                if kind == "scale":
                    parts[a] = value
                    if len(parts) == planning:
                        scale = LatentScale.of_parts([part for start in sorted(parts) for part in parts[start]], n)
                        submit_pieces(scale.rms_per_dim.numpy())
                else:
                    pieces.append(value)
                if progress is not None:
                    progress(done, total)
        finally:
            if task_of:
                client.cancel(list(task_of), force=True)
    result = assemble(codec, chunks, settings, pieces, scale.latent_rms, time.perf_counter() - started, text_source)
    result.provenance["ran_on"] = {"where": where.label(), "shards": len(ranges), "planning_shards": planning}
    return result
