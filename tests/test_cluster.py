"""Sharded work on a real Dask cluster (distributed.LocalCluster, worker processes).

The reference for every check is the one-process sweep of the same checkpoint, text and
settings (DESIGN.md, "When one machine is outgrown": counts exactly equal, sums to float
rounding); that sweep is itself checked against outside references in test_core_sweep.py
and test_core_metrics.py. Faults are real: a worker process is killed with SIGKILL, a
checkpoint is replaced under the client, an adapter raises on the workers only."""

from __future__ import annotations

import os
import shutil
import signal
import sys
import threading
import time
from pathlib import Path

import numpy as np
import pytest

distributed = pytest.importorskip("distributed")

from core.cli import main  # noqa: E402
from core.codecs.open import open_checkpoint  # noqa: E402
from core.engine.cluster import ClusterError, SweepJob, Where, run_sweeps  # noqa: E402
from core.engine.sweep import SweepSettings, read_sweep, run_sweep  # noqa: E402
from core.engine.text import DEMO_TEXT_PATH, chunk_text  # noqa: E402
from core.errors import SweepCancelled  # noqa: E402

SAMPLES = Path(__file__).resolve().parent.parent / "sample_models"
PLAIN, TOLERANT = SAMPLES / "plain.safetensors", SAMPLES / "tolerant.safetensors"
TEXT = DEMO_TEXT_PATH.read_text(encoding="utf-8")[:6000]  # ~420 chunks of 4: two 256-chunk shards
SETTINGS = SweepSettings(sigmas=(0.0, 0.3, 1.0), repeats=2, batch_chunks=256)
ARGS = ["--sigmas", "0,0.3,1", "--repeats", "2", "--batch", "256", "--quiet"]

# An adapter whose "checkpoint" is a small text file naming a built-in checkpoint and a delay
# per decode; it wraps that codec exactly, so its sweep equals the built-in one's.
SLOW_ADAPTER = '''
import time
from pathlib import Path

from core.codecs.checkpoint import load_codec


class Slow:
    def __init__(self, inner, delay):
        self.inner, self.delay = inner, delay
        for name in ("chunk_size", "latent_dim", "vocab_size", "pad_id", "variational", "tokenizer"):
            setattr(self, name, getattr(inner, name))

    def encode(self, ids):
        return self.inner.encode(ids)

    def decode(self, z):
        time.sleep(self.delay)
        return self.inner.decode(z)


def load(path):
    target, delay = Path(path).read_text().split()
    return Slow(load_codec(target).codec, float(delay))
'''

WORKER_ONLY_FAILURE = '''
from pathlib import Path

from core.codecs.checkpoint import load_codec


def load(path):
    try:
        from distributed import get_worker
        get_worker()
    except (ImportError, ValueError):
        return load_codec(Path(path).read_text().split()[0]).codec  # the client opens it
    raise RuntimeError("the licence server cannot be reached from this node")
'''


@pytest.fixture(scope="module")
def cluster():
    with distributed.LocalCluster(n_workers=2, threads_per_worker=1, processes=True, dashboard_address=None,
                                  silence_logs=50) as local, distributed.Client(local, set_as_default=False) as client:
        client.wait_for_workers(2)
        yield local, client


@pytest.fixture(scope="module")
def where(cluster):
    return Where(address=cluster[0].scheduler_address)


@pytest.fixture(scope="module")
def text_file(tmp_path_factory):
    path = tmp_path_factory.mktemp("text") / "held_out.txt"
    path.write_text(TEXT, encoding="utf-8")
    return path


@pytest.fixture(scope="module")
def one_process():
    """The reference: each sample checkpoint swept in this process."""
    out = {}
    for path in (PLAIN, TOLERANT):
        codec = open_checkpoint(path)
        out[path.stem] = run_sweep(codec, chunk_text(TEXT, codec, "t"), SETTINGS)
    return out


def assert_same_sweep(a, b):
    assert a.chunks.num_chunks > 256  # more than one shard
    np.testing.assert_array_equal(a.wrong_counts, b.wrong_counts)
    np.testing.assert_array_equal(a.decoded, b.decoded)
    for ca, cb in zip(a.curves, b.curves):
        counts = ("tokens", "correct", "chunks", "chunks_exact", "bucket_tokens", "confusions", "token_accuracy", "position_accuracy")
        assert {f: getattr(ca, f) for f in counts} == {f: getattr(cb, f) for f in counts}
        np.testing.assert_allclose([ca.nll, ca.brier, ca.ece], [cb.nll, cb.brier, cb.ece], rtol=1e-9, atol=1e-12)
    assert [t.to_dict() for t in a.tolerances] == [t.to_dict() for t in b.tolerances]
    assert a.latent_rms == pytest.approx(b.latent_rms, rel=1e-6)


def slow_checkpoint(folder: Path, name: str, target: Path, delay: float) -> Path:
    folder.mkdir(parents=True, exist_ok=True)
    path = folder / f"{name}.ckpt"
    path.write_text(f"{target} {delay}\n", encoding="utf-8")
    return path


def test_sharded_sweep_from_the_command_line_equals_one_process(cluster, where, text_file, one_process, tmp_path, capsys):
    out = tmp_path / "out"
    code = main(["sweep", str(PLAIN), str(TOLERANT), "--text", str(text_file), "--cluster", where.address, "--out", str(out)] + ARGS)
    assert code == 0, capsys.readouterr().err
    assert len(cluster[1].scheduler_info()["workers"]) == 2  # the scheduler and its workers are left as they were
    for name, reference in one_process.items():
        sharded = read_sweep(out / name)
        assert_same_sweep(reference, sharded)
        assert sharded.provenance["ran_on"]["shards"] >= 2


def test_sharded_compare_equals_one_process(where, text_file, tmp_path, capsys):
    from core.analyses.compare import read_comparison

    here, there = tmp_path / "here", tmp_path / "there"
    base = ["compare", str(PLAIN), str(TOLERANT), "--text", str(text_file)] + ARGS
    assert main(base + ["--out", str(here)]) == 0
    assert main(base + ["--out", str(there), "--cluster", where.address]) == 0, capsys.readouterr().err
    a, b = read_comparison(here), read_comparison(there)
    for sa, sb in zip(a.isotropic + a.data_scale, b.isotropic + b.data_scale):
        assert_same_sweep(sa, sb)
    for pa, pb in zip(a.paired, b.paired):  # McNemar's discordant counts and p-values, from the paired rows
        assert [(r.a_only, r.b_only, r.units) for r in pa.rows] == [(r.a_only, r.b_only, r.units) for r in pb.rows]
        np.testing.assert_allclose([r.pvalue for r in pa.rows], [r.pvalue for r in pb.rows], rtol=1e-12)


def test_sharded_trend_equals_one_process(where, tmp_path):
    from core.analyses.trend import sort_points, trend

    run = tmp_path / "run"
    run.mkdir()
    shutil.copy(PLAIN, run / "step-100.safetensors")
    shutil.copy(TOLERANT, run / "step-200.safetensors")
    here = sort_points(list(trend(run, TEXT, SETTINGS, text_source="t")))
    there = sort_points(list(trend(run, TEXT, SETTINGS, text_source="t", where=where)))
    assert [(p.name, p.step, p.error) for p in here] == [(p.name, p.step, p.error) for p in there]
    assert sorted(p.name for p in there) == ["step-100", "step-200"] and all(p.error is None for p in there)
    for p, q in zip(here, there):
        assert_same_sweep(p.result, q.result)
        assert (p.kl, p.active_dims, p.latent_rms) == (q.kl, q.active_dims, q.latent_rms)  # measured while the workers sweep


def test_an_adapter_raising_on_the_workers_is_one_sentence_and_nothing_is_written(where, text_file, tmp_path, capsys):
    adapter = tmp_path / "licensed.py"
    adapter.write_text(WORKER_ONLY_FAILURE, encoding="utf-8")
    ckpt = slow_checkpoint(tmp_path / "ckpts", "licensed", PLAIN, 0)
    out = tmp_path / "out"
    code = main(["sweep", str(ckpt), "--adapter", str(adapter), "--text", str(text_file), "--cluster", where.address,
                 "--out", str(out)] + ARGS)
    err = capsys.readouterr().err
    assert code == 2
    assert f"running the adapter code in {adapter}" in err and "on every worker" in err  # said before it runs
    message = err.strip().splitlines()[-1]
    assert message.startswith(f"chunkscope: {ckpt}: the shard of chunks")
    assert "failed on every try" in message and "the licence server cannot be reached from this node" in message
    assert str(adapter) in message and "chunkscope-adapters" not in message  # named as the user named it
    assert message.count(". ") == 0 and message.endswith(".")
    assert not out.exists()


def test_a_checkpoint_changed_under_the_client_is_refused_on_the_workers(where, tmp_path):
    path = tmp_path / "model.safetensors"
    shutil.copy(PLAIN, path)
    codec = open_checkpoint(path)
    chunks = chunk_text(TEXT, codec, "t")
    shutil.copy(TOLERANT, path)  # the workers now find another file at the same path
    with pytest.raises(ClusterError) as info:
        run_sweeps([SweepJob(codec, chunks, SETTINGS)], where)
    message = str(info.value)
    assert message.startswith(f"{path}: the shard of chunks") and "sha256" in message and codec.sha256[:12] in message
    assert "\n" not in message


def test_without_distributed_workers_says_what_to_install(monkeypatch, text_file, tmp_path, capsys):
    monkeypatch.setitem(sys.modules, "distributed", None)  # `import distributed` now raises ImportError
    out = tmp_path / "out"
    assert main(["sweep", str(PLAIN), "--text", str(text_file), "--workers", "2", "--out", str(out)] + ARGS) == 2
    err = capsys.readouterr().err.strip()
    assert err == "chunkscope: running on a cluster needs Dask's distributed package: pip install chunkscope[cluster]."
    assert not out.exists()


def test_a_local_cluster_has_one_thread_per_process_and_is_shut_down_afterwards():
    from core.engine.cluster import cluster_client

    with cluster_client(Where(workers=1)) as client:
        assert list(client.nthreads().values()) == [1]
        # the workers of a local cluster run without Dask's sampling profiler (its config key, from
        # distributed's documented configuration)
        import dask

        assert list(client.run(lambda: dask.config.get("distributed.worker.profile.enabled")).values()) == [False]
        local = client.cluster
    assert local.status.name == "closed" and client.status == "closed"


def test_cancel_stops_the_shards_on_the_cluster(cluster, where, tmp_path):
    local, client = cluster
    ckpt = slow_checkpoint(tmp_path, "slow", PLAIN, 0.3)
    adapter = tmp_path / "slow_adapter.py"
    adapter.write_text(SLOW_ADAPTER, encoding="utf-8")
    codec = open_checkpoint(ckpt, str(adapter))
    started = []

    def stop() -> bool:
        if not started and any(client.processing().values()):
            started.append(time.monotonic())
        return bool(started) and time.monotonic() - started[0] > 0.5

    with pytest.raises(SweepCancelled):
        run_sweeps([SweepJob(codec, chunk_text(TEXT, codec, "t"), SETTINGS, adapter=str(adapter))], where, should_stop=stop)
    deadline = time.monotonic() + 10
    while time.monotonic() < deadline and any(client.processing().values()):
        time.sleep(0.1)
    assert not any(client.processing().values())  # nothing of the sweep still runs on the workers
    assert started


def test_the_workbench_runs_its_sweeps_where_the_setting_says(window, where, qtbot):
    from app.run_on import RunOnDialog, where_from_setting

    sweep_menu = next(a.menu() for a in window.menuBar().actions() if a.text() == "&Sweep")
    assert window.run_on.action in sweep_menu.actions()
    window.run_on.set(where)
    assert where_from_setting(window.settings.value("run_on")) == where  # kept between sessions
    assert RunOnDialog(where, window).where() == where  # the dialog opens on the current choice
    bench = window.workbench
    bench.set_text(TEXT, "held-out")
    qtbot.waitUntil(lambda: bench.entries and all(e.ready for e in bench.entries.values()), timeout=60_000)
    path = next(p for p in bench.entries if p.endswith("plain.safetensors"))
    entry = bench.entry(path)
    progress = []
    bench.sweep_progress.connect(lambda p, done, total: progress.append((done, total)))
    with qtbot.waitSignal(bench.sweep_ended, timeout=60_000, check_params_cb=lambda p, how: p == path) as ended:
        assert bench.start_sweep(SETTINGS, path)
    assert ended.args[1] == "done"
    assert progress and progress[-1][0] == progress[-1][1] >= 2  # one step per finished shard
    assert entry.sweep.provenance["ran_on"]["where"] == where.label()
    assert_same_sweep(run_sweep(entry.codec, entry.chunks, SETTINGS, encoded=entry.encoded), entry.sweep)
    window.run_on.set(Where())


def test_a_worker_killed_mid_sweep_leaves_the_result_identical(cluster, where, tmp_path, one_process):
    local, client = cluster
    ckpt = slow_checkpoint(tmp_path, "slow", PLAIN, 0.4)
    adapter = tmp_path / "slow_adapter.py"
    adapter.write_text(SLOW_ADAPTER, encoding="utf-8")
    codec = open_checkpoint(ckpt, str(adapter))
    pids_before = client.run(os.getpid)
    killed = []

    def kill_a_busy_worker():
        deadline = time.monotonic() + 60
        while time.monotonic() < deadline:
            busy = [addr for addr, keys in client.processing().items() if any("chunkscope-shard" in str(k) for k in keys)]
            if busy:
                time.sleep(0.5)  # well inside the shard: it has decoded a batch or two
                os.kill(pids_before[busy[0]], signal.SIGKILL)
                killed.append(busy[0])
                return
            time.sleep(0.05)

    killer = threading.Thread(target=kill_a_busy_worker)
    killer.start()
    (result,) = run_sweeps([SweepJob(codec, chunk_text(TEXT, codec, "t"), SETTINGS, adapter=str(adapter))], where)
    killer.join()
    assert killed, "no worker was busy with a shard to kill"
    client.wait_for_workers(2, timeout=60)
    assert set(client.run(os.getpid).values()) != set(pids_before.values())  # the nanny started a new process
    assert_same_sweep(one_process["plain"], result)


def _numbers_alike(a, b, path="predictions.json"):
    """Counts (ints, strings) exactly equal, floats within 1e-9 relative (DESIGN.md: sums to float rounding)."""
    if isinstance(a, dict):
        assert a.keys() == b.keys(), path
        for key in a:
            _numbers_alike(a[key], b[key], f"{path}.{key}")
    elif isinstance(a, list):
        assert len(a) == len(b), path
        for i, (x, y) in enumerate(zip(a, b)):
            _numbers_alike(x, y, f"{path}[{i}]")
    elif isinstance(a, float) or isinstance(b, float):
        assert a == pytest.approx(b, rel=1e-9, abs=1e-12, nan_ok=True), path
    else:
        assert a == b, path


def test_sharded_predictions_equal_one_process(where, text_file, tmp_path, capsys):
    # the reference is the same command in this process; its numbers are checked against outside
    # references in test_core_predictions.py
    import json

    import torch

    from core.analyses.prediction_file import write_predictions
    from core.engine.noise import encode_chunks

    codec = open_checkpoint(TOLERANT)
    chunks = chunk_text(TEXT, codec, "t")
    assert chunks.num_chunks > 256  # the sweep has more than one shard
    mean = encode_chunks(codec, chunks).mean
    eps = torch.randn(len(mean), 2, mean.shape[1], generator=torch.Generator().manual_seed(3))
    preds = tmp_path / "preds.safetensors"
    write_predictions(preds, (mean.unsqueeze(1) + 0.5 * mean.square().mean(0).sqrt() * eps).numpy(),
                      chunks.ids().numpy(), codec.sha256, "cluster test", text=TEXT)
    base = ["predictions", str(TOLERANT), str(preds), "--quiet", "--repeats", "2"]
    assert main(base + ["--out", str(tmp_path / "here")]) == 0
    assert main(base + ["--out", str(tmp_path / "there"), "--cluster", where.address]) == 0
    assert "sharding the work over the Dask scheduler" in capsys.readouterr().err
    here, there = (json.loads((tmp_path / d / "predictions.json").read_text(encoding="utf-8")) for d in ("here", "there"))
    for doc in (here, there):
        doc.pop("provenance", None)  # where and when it ran differ by design
        doc.pop("elapsed_s", None)
    _numbers_alike(here, there)


def test_without_distributed_predictions_workers_says_what_to_install(monkeypatch, tmp_path, capsys):
    monkeypatch.setitem(sys.modules, "distributed", None)  # `import distributed` now raises ImportError
    out = tmp_path / "out"
    assert main(["predictions", str(TOLERANT), str(tmp_path / "none.safetensors"), "--workers", "2", "--out", str(out)]) == 2
    err = capsys.readouterr().err.strip()
    assert err == "chunkscope: running on a cluster needs Dask's distributed package: pip install chunkscope[cluster]."
    assert not out.exists()


def test_report_takes_cluster_and_writes_its_page(where, text_file, tmp_path, capsys):
    # acceptance only: the sharded sweep itself is checked against one process above (common practice)
    out = tmp_path / "report.html"
    assert main(["report", str(PLAIN), "--text", str(text_file), "--out", str(out), "--cluster", where.address] + ARGS) == 0
    assert "sharding the work over the Dask scheduler" in capsys.readouterr().err
    assert out.read_text(encoding="utf-8").lstrip().lower().startswith("<!doctype html")


def test_the_planning_pass_is_sharded_and_its_plan_is_the_one_process_plan(where):
    """Data-scale noise needs the whole text's r before any shard: the workers measure it in
    ENCODE_BATCH-aligned pieces and the client adds them in order, so r (hence every perturbation)
    is the one-process plan's bit for bit. Reference: plan_sweep and run_sweep in this process."""
    from core.engine.noise import ENCODE_BATCH
    from core.engine.sweep import plan_sweep

    codec = open_checkpoint(PLAIN)
    long_text = DEMO_TEXT_PATH.read_text(encoding="utf-8")
    chunks = chunk_text((long_text + "\n") * 7, codec, "t")
    assert chunks.num_chunks > 2 * ENCODE_BATCH  # at least three planning pieces
    settings = SweepSettings(sigmas=(0.0, 0.5), repeats=1, noise="data-scale")
    (sharded,) = run_sweeps([SweepJob(codec, chunks, settings)], where)
    assert sharded.provenance["ran_on"]["planning_shards"] >= 2
    plan = plan_sweep(codec, chunks, settings)
    assert sharded.latent_rms == plan.latent_rms  # exactly: the same blocks added in the same order
    whole = run_sweep(codec, chunks, settings)
    np.testing.assert_array_equal(sharded.wrong_counts, whole.wrong_counts)
    np.testing.assert_array_equal(sharded.decoded, whole.decoded)
    assert [c.correct for c in sharded.curves] == [c.correct for c in whole.curves]


def test_a_sharded_worst_case_equals_the_one_process_worst_case(where):
    """Reference: worst_case in this process (itself checked against DeepFool's closed form for a
    linear decoder in test_core_worstcase.py). The shards are whole search batches with the same
    seeds per chunk, so counts (decoder calls, flipped positions and tokens) are identical and radii
    agree to float rounding."""
    from core.analyses.worstcase import WorstCaseSettings, worst_case

    codec = open_checkpoint(TOLERANT)
    chunks = chunk_text(TEXT, codec, "t")
    settings = WorstCaseSettings(seed=5, sigmas=(0.3, 1.0, 3.0), repeats=2, candidates=2, iterations=3, batch_chunks=128)
    here = worst_case(codec, chunks, settings, text_source="t")
    there = worst_case(codec, chunks, settings, text_source="t", where=where)
    assert there.provenance["ran_on"]["shards"] >= 3 and there.provenance["ran_on"]["where"] == where.label()
    for name in ("position", "from_id", "to_id", "forward_calls", "backward_calls"):
        np.testing.assert_array_equal(getattr(there, name), getattr(here, name), err_msg=name)
    assert there.random_calls == here.random_calls and here.verified.sum() > 0
    for name in ("radius", "relative_radius", "random_radius", "random_relative_radius", "random_sigma", "perturbation"):
        np.testing.assert_allclose(getattr(there, name), getattr(here, name), rtol=1e-6, atol=1e-9, err_msg=name)
    assert there.latent_rms == here.latent_rms  # r from the sharded planning pass, bit for bit
    assert there.token_text == here.token_text


def test_without_distributed_worstcase_workers_says_what_to_install(monkeypatch, tmp_path, capsys):
    monkeypatch.setitem(sys.modules, "distributed", None)  # `import distributed` now raises ImportError
    out = tmp_path / "out"
    assert main(["worstcase", str(TOLERANT), "--workers", "2", "--out", str(out), "--quiet"]) == 2
    err = capsys.readouterr().err.strip()
    assert err == "chunkscope: running on a cluster needs Dask's distributed package: pip install chunkscope[cluster]."
    assert not out.exists()
