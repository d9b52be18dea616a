"""The `chunkscope` command line. With no subcommand it opens the workbench."""

from __future__ import annotations

import argparse
import json
import os
import sys
from pathlib import Path

import core
from core.errors import ChunkscopeError, SweepCancelled


class TerminalProgress:
    """A tqdm progress bar on stderr, fed by the engine's `progress(done, total)` callbacks.

    The time left comes from core.engine.timeleft (the workbench shows the same estimate):
    nothing before 5 % of the work is done, then the average rate since the first call."""

    def __init__(self, label: str, stream=None, mininterval: float | None = None):
        self.label = label
        self.stream = stream or sys.stderr
        tty = hasattr(self.stream, "isatty") and self.stream.isatty()
        self.mininterval = mininterval if mininterval is not None else (0.1 if tty else 5.0)
        self.size: dict = {}  # tqdm's own choice, except on a terminal that reports no size (tqdm would print nothing)
        if tty:
            try:
                known = os.get_terminal_size(self.stream.fileno()).lines > 1
            except (OSError, ValueError, AttributeError):
                known = False
            self.size = {"dynamic_ncols": True} if known else {"ncols": 80, "nrows": 24}
        self.bar = None
        self.time_left = None

    _FORMAT = "{desc} {percentage:5.1f}%|{bar}| {elapsed} elapsed{postfix}"

    def __call__(self, done: int, total: int) -> None:
        from tqdm import tqdm

        from core.engine.timeleft import TimeLeft, time_left_text

        if self.bar is None or self.bar.total != total:
            if self.bar is not None:
                self.bar.close()
            self.bar = tqdm(total=total, desc=self.label, file=self.stream, mininterval=self.mininterval, miniters=1,
                            bar_format=self._FORMAT, leave=True, **self.size)
            self.time_left = TimeLeft()
        left = time_left_text(self.time_left.update(done, total))
        self.bar.set_postfix_str(left, refresh=False)  # tqdm writes ", " before a postfix
        self.bar.update(done - self.bar.n)
        if done >= total:
            self.bar.close()


def _load_text_arg(path: str | None) -> tuple[str, str]:
    from core.engine.text import DEMO_TEXT_PATH, load_text

    if path is None:
        return load_text(DEMO_TEXT_PATH), f"demo text ({DEMO_TEXT_PATH.name})"
    return load_text(path), str(path)


ADAPTER_HELP = (
    "a Python adapter that opens the checkpoints: FILE.py (its load(path)), FILE.py:FUNC, or the name of an "
    "installed chunkscope.adapters entry point; it opens every checkpoint that is not a chunkscope safetensors "
    "file or ONNX codec folder (those open as always). Runs that file's code."
)


def announce_adapter(adapter: str | None, paths, stream=None, where=None) -> None:
    """Before any adapter code runs: one line naming the file whose code runs, and its sha256
    (and, on a cluster, that it runs on every worker too)."""
    if not adapter:
        return
    from core.codecs.adapter import adapter_identity
    from core.codecs.open import uses_adapter

    if not any(Path(p).exists() and uses_adapter(p) for p in paths):  # a missing checkpoint is refused before any code runs
        return
    what, sha = adapter_identity(adapter)
    workers = f", here and on every worker of {where.label()}" if where is not None and not where.here else ""
    print(f"chunkscope: running the adapter code in {what}" + (f" (sha256 {sha})" if sha else "") + workers,
          file=stream or sys.stderr)


def open_checkpoints(paths, adapter: str | None = None, where=None) -> list:
    from core.codecs.open import open_checkpoint

    paths = list(paths)
    announce_adapter(adapter, paths, where=where)
    return [open_checkpoint(p, adapter) for p in paths]


def add_cluster_arguments(p: argparse.ArgumentParser) -> None:
    """--workers / --cluster: where a command's shardable work runs (see core.engine.cluster).
    Any command whose work is made of sweeps can take them; pass `where_from_args(args)` on."""
    group = p.add_mutually_exclusive_group()
    group.add_argument("--workers", type=int, metavar="N",
                       help="shard the work over a local Dask cluster of N processes, one thread each (needs chunkscope[cluster])")
    group.add_argument("--cluster", metavar="ADDRESS",
                       help="shard the work over a running Dask scheduler, e.g. tcp://10.1.2.3:8786; its workers open the "
                            "checkpoints from the same paths (needs chunkscope[cluster])")


def where_from_args(args: argparse.Namespace):
    """Where the work runs, checked before any work (without distributed: what to install)."""
    from core.engine.cluster import Where
    from core.errors import SettingsError

    workers = getattr(args, "workers", None)
    if workers is not None and workers < 1:
        raise SettingsError(f"--workers needs a whole number >= 1, not {workers}.")
    where = Where(workers=workers or 0, address=getattr(args, "cluster", None) or "").validated()
    if not where.here:
        print(f"chunkscope: sharding the work over {where.label()}", file=sys.stderr)
    return where


def _fmt(value) -> str:
    return "—" if value is None else f"{value:.4g}"


def cmd_info(args: argparse.Namespace) -> int:
    from core.engine.health import latent_health
    from core.engine.text import chunk_text

    (codec,) = open_checkpoints([args.checkpoint], args.adapter)
    text, source = _load_text_arg(args.text)
    chunks = chunk_text(text, codec, source)
    health = latent_health(codec, chunks)
    if args.json:
        print(json.dumps({"codec": codec.describe(), "health": health.summary(), "text": source}, indent=1))
        return 0
    from core.codecs.summary import codec_rows

    print(codec.name)
    for label, value in codec_rows(codec):
        print(f"  {label:<26} {value}")
    print(f"latent health on {source} ({chunks.num_tokens:,} tokens, {chunks.num_chunks:,} chunks)")
    s = health.summary()
    print(f"  latent RMS     {s['latent_rms']:.4g}")
    print(f"  active dims    {s['active_dims']} of {codec.latent_dim} (variance of the mean > {s['active_threshold']})")
    if "kl_total" in s:
        print(f"  KL to N(0,I)   {s['kl_total']:.4g} nats per chunk; mean posterior std {s['posterior_std_mean']:.4g}")
    print(f"  nearest-neighbour half-distance  median {_fmt(s['nn_half_distance_median'])}, "
          f"1st percentile {_fmt(s['nn_half_distance_p01'])} over {s['nn_chunks']:,} distinct chunks"
          + (" (sampled)" if s["nn_sampled"] else ""))
    if codec.card:
        print("card")
        for line in json.dumps(codec.card, indent=2, ensure_ascii=False).splitlines()[1:-1]:
            print(line)
    else:
        print("card           (none)")
    return 0


def _settings_from_args(args: argparse.Namespace):
    from core.engine.sweep import SweepSettings, parse_sigmas

    sigmas = parse_sigmas(args.sigmas) if args.sigmas else SweepSettings().sigmas
    return SweepSettings(sigmas=sigmas, repeats=args.repeats, noise=args.noise, seed=args.seed, batch_chunks=args.batch).validated()


def print_tolerance_table(results, stream=None) -> None:
    """Each sweep's accuracy at σ = 0, its accuracy-level and its loss tolerances, and the latent RMS."""
    from core.engine.noise import sigma_unit
    from core.engine.tolerance import ABSOLUTE, LOSS, LOSS_LEVELS, TOLERANCE_LEVELS, level_percent, resolution_note, status_notes
    from core.engine.tolerance import UNRESOLVABLE

    stream = stream or sys.stdout
    noise = results[0].settings.noise
    levels = [(ABSOLUTE, level) for level in TOLERANCE_LEVELS] + [(LOSS, level) for level in LOSS_LEVELS]
    rows = []
    for r in results:
        acc0 = r.accuracy_at_zero
        tols = [r.tolerance(level, kind) for kind, level in levels]
        rows.append([r.codec_name, "—" if acc0 != acc0 else f"{acc0 * 100:.3f}%"] + [t.label() for t in tols]
                    + [f"{r.latent_rms:.4g}"])
    header = ["checkpoint", "acc@σ=0"] + [level_percent(level, kind) for kind, level in levels] + ["latent RMS"]
    widths = [max([8] + [len(row[i]) for row in rows + [header]]) for i in range(len(header))]
    widths[0] = min(max(len(row[0]) for row in rows + [header]), 22)
    n_abs = len(TOLERANCE_LEVELS)
    blocks = [(0, 2), (2, 2 + n_abs), (2 + n_abs, len(header) - 1), (len(header) - 1, len(header))]

    def line(cells: list[str]) -> str:
        parts = []
        for i, (a, b) in enumerate(blocks):
            parts.append(" ".join(f"{c[:w]:<{w}}" if i == 0 and j == a else f"{c:>{w}}"
                                  for j, (c, w) in enumerate(zip(cells[a:b], widths[a:b]), start=a)))
        return "   ".join(parts)

    print(f"tolerance in {sigma_unit(noise)} ({noise} noise): the largest σ with token accuracy ≥ the level, "
          "or with its loss from σ = 0 ≤ the points", file=stream)
    spans = [sum(widths[a:b]) + b - a - 1 for a, b in blocks]
    print((" " * (spans[0] + 3) + f"{'accuracy ≥':<{spans[1]}}   {'loss ≤'}").rstrip(), file=stream)
    print(line(header), file=stream)
    for row in rows:
        print(line(row), file=stream)
    notes = status_notes([t for r in results for t in r.tolerances + r.loss_tolerances], skip=[UNRESOLVABLE])  # said below
    if notes:
        print("; ".join(notes) + ".", file=stream)
    for r in results:
        note = resolution_note(r.chunks.num_tokens, r.tolerances + r.loss_tolerances)
        if note:
            print(f"{r.codec_name}: {note}", file=stream)
    if noise != "data-scale":
        print("absolute σ depends on each codec's latent scale: compare with the latent RMS, or sweep with --noise data-scale.", file=stream)


def _already_exist(paths: list[Path], options: str = "--out") -> ChunkscopeError:
    if len(paths) == 1:
        return ChunkscopeError(f"{paths[0]} already exists; pass --force to replace it, or choose another {options}.")
    listed = ", ".join(str(p) for p in paths[:-1]) + f" and {paths[-1]}"
    return ChunkscopeError(f"{listed} already exist; pass --force to replace them, or choose another {options}.")


def _check_outputs(targets: list[Path], force: bool, recognise, folder: bool) -> None:
    """Before any work: each target is free or replaceable, and its folder can be written."""
    _check_targets([(target, recognise, folder, "--out") for target in targets], force)


def _check_targets(items: list[tuple[Path, object, bool, str]], force: bool) -> None:
    """`_check_outputs` for outputs of several kinds: (target, recognise, folder, option naming it) each."""
    from core.outputs.files import OutputExistsError, check_target, check_writable

    existing, options = [], []
    for target, recognise, folder, option in items:
        try:
            check_target(target, force, recognise, folder=folder)
        except OutputExistsError:
            existing.append(target)
            options += [option] if option not in options else []
    if existing:
        raise _already_exist(existing, " or ".join(options))
    for target, _, _, _ in items:
        check_writable(target)


def cmd_sweep(args: argparse.Namespace) -> int:
    from core.engine.sweep import SWEEP_FOLDER, run_sweep
    from core.engine.text import chunk_text
    from core.outputs.files import OutputRefusedError, Outputs

    settings = _settings_from_args(args)
    where = where_from_args(args)
    out = Path(args.out)
    if out.exists() and not out.is_dir():
        raise OutputRefusedError(f"{out} is a file, and sweep results go into a folder; choose another --out.")
    text, source = _load_text_arg(args.text)
    codecs = open_checkpoints(args.checkpoints, args.adapter, where)
    names = [c.name for c in codecs]
    if len(set(names)) != len(names):
        raise ChunkscopeError("two checkpoints share a file name, so their output folders would collide; rename one.")
    targets = [out / name for name in names]
    _check_outputs(targets, args.force, SWEEP_FOLDER, folder=True)
    for codec in codecs:
        settings.validated(codec)
    results = []
    if where.here:
        for codec in codecs:
            chunks = chunk_text(text, codec, source)
            progress = TerminalProgress(f"{codec.name[:16]:<16}") if not args.quiet else None
            result = run_sweep(codec, chunks, settings, progress=progress, text_source=source)
            results.append(result)
            print(f"swept {codec.name} ({result.decoded_chunks:,} decoded chunks in {result.elapsed_s:.1f}s)", file=sys.stderr)
    else:
        from core.engine.cluster import SweepJob, run_sweeps
        from core.codecs.open import uses_adapter

        jobs = [SweepJob(c, chunk_text(text, c, source), settings, source, adapter=args.adapter if args.adapter and uses_adapter(p) else None)
                for c, p in zip(codecs, args.checkpoints)]
        results = run_sweeps(jobs, where, progress=None if args.quiet else TerminalProgress(f"{'shards':<16}"))
        for result in results:
            print(f"swept {result.codec_name} ({result.decoded_chunks:,} decoded chunks, {result.elapsed_s:.1f}s)", file=sys.stderr)
    with Outputs(args.force) as outputs:  # every checkpoint's folder appears together, or none
        for result, target in zip(results, targets):
            result.write_into(outputs.folder(target, SWEEP_FOLDER))
    print(f"wrote {', '.join(f'{t}/' for t in targets)}", file=sys.stderr)
    print_tolerance_table(results)
    return 0


def print_comparison(comparison, stream=None) -> None:
    from core.analyses.compare import ALPHA, SIGNIFICANT
    from core.engine.noise import sigma_unit
    from core.engine.tolerance import ABSOLUTE, LOSS, levels_of, level_percent

    stream = stream or sys.stdout
    for kind, word in ((ABSOLUTE, "accuracy ≥"), (LOSS, "loss ≤")):
        print(f"tolerance, {word} the level: " + " | ".join(f"{sigma_unit(n)} ({n})" for n in ("isotropic", "data-scale")), file=stream)
        heads = [level_percent(level, kind) for level in levels_of(kind)]
        print(f"{'checkpoint':<20} {'acc@σ=0':>9} {'RMS':>7} | " + " ".join(f"{h:>9}" for h in heads) + " | "
              + " ".join(f"{h:>9}" for h in heads), file=stream)
        for t in comparison.tolerances:
            iso = [x.label() for x in (t.absolute if kind == ABSOLUTE else t.absolute_loss)]
            ds = [x.label() for x in (t.data_scale if kind == ABSOLUTE else t.data_scale_loss)]
            print(f"{t.name[:20]:<20} {t.accuracy_at_zero * 100:8.3f}% {t.latent_rms:7.3g} | "
                  + " ".join(f"{x:>9}" for x in iso) + " | " + " ".join(f"{x:>9}" for x in ds), file=stream)
    if comparison.scale_warning:
        print(f"warning: {comparison.scale_warning}", file=stream)
    for p in comparison.paired:
        real = [r for r in p.rows if r.pvalue < ALPHA]
        what = f"{p.name_b} − {p.name_a} ({comparison.main_noise}, per {p.unit})"
        if not real:
            print(f"{what}: the difference is not significant at {SIGNIFICANT} at any σ of the grid.", file=stream)
            continue
        where = ", ".join(f"{r.sigma:.3g} ({100 * r.difference:+.2f} pts)" for r in real[:8])
        print(f"{what}: significant at {SIGNIFICANT} at σ = {where}" + (" …" if len(real) > 8 else ""), file=stream)


def _comparison_from_args(args, codecs, text, source, progress=None, where=None):
    from core.analyses.compare import compare_codecs
    from core.engine.sweep import parse_sigmas

    settings = _settings_from_args(args)
    absolute = parse_sigmas(args.abs_sigmas) if getattr(args, "abs_sigmas", None) else None
    return compare_codecs(codecs, text, sigmas=settings.sigmas, absolute_sigmas=absolute, repeats=settings.repeats,
                          seed=settings.seed, main_noise=settings.noise, text_source=source, progress=progress,
                          where=where, adapter=args.adapter)


def cmd_compare(args: argparse.Namespace) -> int:
    from core.analyses.compare import COMPARE_FOLDER

    _settings_from_args(args)
    where = where_from_args(args)
    out = Path(args.out)
    _check_outputs([out], args.force, COMPARE_FOLDER, folder=True)
    text, source = _load_text_arg(args.text)
    codecs = open_checkpoints(args.checkpoints, args.adapter, where)
    if len({c.name for c in codecs}) != len(codecs):
        raise ChunkscopeError("two checkpoints share a file name; rename one so the results can be told apart.")
    progress = None if args.quiet else TerminalProgress("compare" if where.here else "compare shards")
    comparison = _comparison_from_args(args, codecs, text, source, progress, where)
    comparison.write(out, force=args.force)
    print(f"wrote {out}/ (compare.json, tolerances.csv, paired.csv, sweeps/)", file=sys.stderr)
    print_comparison(comparison)
    return 0


def cmd_trend(args: argparse.Namespace) -> int:
    from core.analyses.trend import check_trend_output, checkpoints_in, trend, write_trend
    from core.outputs.files import OutputExistsError

    settings = _settings_from_args(args)
    where = where_from_args(args)
    paths = checkpoints_in(args.folder, args.adapter)  # a missing or empty folder is said before the table starts
    out = Path(args.out) if args.out else None
    if out is not None:
        try:
            check_trend_output(out, args.force)
        except OutputExistsError as exc:
            raise _already_exist([exc.path]) from None
    text, source = _load_text_arg(args.text)
    from core.engine.tolerance import ABSOLUTE, LOSS, LOSS_LEVELS, STATUS_TEXT, TOLERANCE_LEVELS, level_percent

    announce_adapter(args.adapter, paths, where=where)
    points = []
    levels = [(ABSOLUTE, level) for level in TOLERANCE_LEVELS] + [(LOSS, level) for level in LOSS_LEVELS]
    width = max(10, *(len(text) for text in STATUS_TEXT.values()))  # a tolerance cell holds its longest word
    print(f"{'':<48}{'accuracy ≥':<{3 * width + 4}}loss ≤")
    print(f"{'checkpoint':<28} {'step':>8} {'acc@σ=0':>9} " + " ".join(f"{level_percent(lv, k):>{width}}" for k, lv in levels[:3])
          + "  " + " ".join(f"{level_percent(lv, k):>{width}}" for k, lv in levels[3:])
          + f" {'lat. RMS':>9} {'KL nats':>9} {'active':>7}")
    for point in trend(args.folder, text, settings, text_source=source, adapter=args.adapter, where=where):
        points.append(point)
        if point.error:
            print(f"{point.name[:28]:<28} {'' if point.step is None else point.step:>8} failed: {point.error}")
            continue
        tols = [point.tolerance(level, kind) for kind, level in levels]
        cells = [f"{'—' if t is None else t.label():>{width}}" for t in tols]
        latent = (f" {'—' if point.latent_rms is None else f'{point.latent_rms:.4g}':>9}"
                  f" {'—' if point.kl is None else f'{point.kl:.4g}':>9}"
                  f" {'—' if point.active_dims is None else point.active_dims:>7}")
        print(f"{point.name[:28]:<28} {'' if point.step is None else point.step:>8} {point.accuracy_at_zero * 100:8.3f}% "
              + " ".join(cells[:3]) + "  " + " ".join(cells[3:]) + latent, flush=True)
    if out is not None:
        written = write_trend(out, points, force=args.force)
        print(f"wrote {' and '.join(str(p) for p in written)}", file=sys.stderr)
    return 0 if any(p.error is None for p in points) else 2


def is_report_file(path: Path) -> bool:
    """An HTML file: the kind of file `report` writes, and so the only kind --force replaces."""
    try:
        with open(path, "rb") as handle:
            head = handle.read(512).lstrip(b"\xef\xbb\xbf \t\r\n").lower()
    except OSError:
        return False
    return head.startswith(b"<!doctype html") or head.startswith(b"<html")


def cmd_report(args: argparse.Namespace) -> int:
    from core.analyses.compare import read_comparison
    from core.outputs.files import Outputs
    from core.outputs.report import FIGURES_FOLDER, render_report, report_sections, save_report_figures
    from core.engine.sweep import read_sweep, run_sweep
    from core.engine.text import chunk_text
    from core.analyses.trend import checkpoints_in, trend

    out = Path(args.out)
    figures = Path(args.figures) if args.figures else None
    if not args.inputs and not args.trend:
        raise ChunkscopeError("give checkpoints or result folders to report on, or --trend FOLDER.")
    settings = _settings_from_args(args)
    where = where_from_args(args)
    _check_report_outputs(out, figures, args.force)
    sweeps, comparison, points = [], None, []
    paths = [Path(p) for p in args.inputs]
    from core.codecs.onnx import is_onnx_codec

    def is_result_folder(p: Path) -> bool:
        return p.is_dir() and not is_onnx_codec(p) and ((p / "compare.json").exists() or (p / "sweep.json").exists() or not args.adapter)

    folders = [p for p in paths if is_result_folder(p)]
    files = [p for p in paths if not is_result_folder(p)]
    if getattr(args, "worst_case", False) and not files:
        raise ChunkscopeError("--worst-case searches checkpoints on the text, so give at least one checkpoint, not only result folders.")
    for folder in folders:
        if (folder / "compare.json").exists():
            comparison = read_comparison(folder)
        else:
            sweeps.append(read_sweep(folder))
    if files or args.trend:
        text, source = _load_text_arg(args.text)
    extra = []
    if files:
        codecs = open_checkpoints(files, args.adapter, where)
        if getattr(args, "worst_case", False):
            from core.analyses.worstcase import WorstCaseSettings, refuse_without_gradients, report_section, worst_case

            worst_settings = WorstCaseSettings(seed=settings.seed, repeats=settings.repeats).validated()  # the report's own

            for codec in codecs:  # before any work: a codec without gradients is refused at once
                refuse_without_gradients(codec)
            for codec in codecs:
                chunks = chunk_text(text, codec, source)
                progress = None if args.quiet else TerminalProgress(f"worst {codec.name[:10]:<10}")
                extra.append(report_section(worst_case(codec, chunks, worst_settings, progress=progress, text_source=source,
                                                       where=where, adapter=args.adapter)))
        if len(codecs) >= 2:
            comparison = _comparison_from_args(args, codecs, text, source, None if args.quiet else TerminalProgress("compare"), where)
        else:
            chunks = chunk_text(text, codecs[0], source)
            progress = None if args.quiet else TerminalProgress(codecs[0].name[:16])
            if where.here:
                sweeps.append(run_sweep(codecs[0], chunks, settings, text_source=source, progress=progress))
            else:
                from core.engine.cluster import SweepJob, run_sweeps

                sweeps.extend(run_sweeps([SweepJob(codecs[0], chunks, settings, source, adapter=args.adapter)], where, progress=progress))
    if args.trend:
        if not files:
            announce_adapter(args.adapter, checkpoints_in(args.trend, args.adapter), where=where)
        points = list(trend(args.trend, text, settings, text_source=source, adapter=args.adapter, where=where))
    if args.predictions:
        from core.analyses.predictions import PredictionsError, analyse_predictions, read_predictions, report_section

        predictions = read_predictions(args.predictions)
        matching = [c for c in (codecs if files else []) if c.sha256 == predictions.codec_sha256]
        if not matching:
            raise PredictionsError(f"{args.predictions} was made for the codec with sha256 {predictions.codec_sha256[:12]}…, "
                                   "and no checkpoint given to report has it; give that checkpoint too.")
        extra.append(report_section(analyse_predictions(matching[0], predictions, repeats=settings.repeats, seed=settings.seed,
                                                        where=where, adapter=args.adapter)))
    sections = report_sections(sweeps=sweeps, comparison=comparison, trend_points=points, trend_noise=settings.noise,
                               extra_sections=extra)
    html = render_report(sections, title=args.title)
    with Outputs(args.force) as outputs:  # the page and its figure folder appear together, or neither
        outputs.file(out, is_report_file).write_text(html, encoding="utf-8")
        if figures is not None:
            written = save_report_figures(sections, outputs.folder(figures, FIGURES_FOLDER), title=args.title)
    print(f"wrote {out} ({len(html) / 1024:.0f} KiB, self-contained)", file=sys.stderr)
    if figures is not None:
        print(f"wrote {len(written)} figure{'s' if len(written) != 1 else ''} as PDF into {figures}", file=sys.stderr)
    return 0


def print_worst_case(result, stream=None) -> None:
    """The worst-case summary: radii beside the random radius, failures, calls per chunk."""
    stream = stream or sys.stdout
    s = result.summary()

    def num(x) -> str:
        return "—" if x is None else f"{x:.4g}"

    print(f"worst case on {result.provenance['codec']['name']}: {s['verified']:,} of {s['chunks']:,} chunks verified"
          + (f", {s['failed']:,} where the search found no breaking perturbation" if s["failed"] else ""), file=stream)
    print(f"  median radius         {num(s['radius_median'])} absolute, {num(s['relative_radius_median'])} relative "
          f"(smallest {num(s['radius_min'])}; latent RMS {num(s['latent_rms'])})", file=stream)
    print(f"  median random radius  {num(s['random_radius_median'])} absolute, {num(s['random_relative_radius_median'])} "
          f"relative ({s['broke_on_grid']:,} chunks broke on the data-scale grid)", file=stream)
    if s["compared"]:
        print(f"  worst case below random for {s['below_random']:,} of {s['compared']:,} chunks "
              f"({100 * s['below_random_rate']:.1f} %); median ratio {num(s['radius_over_random_median'])}", file=stream)
    print(f"  decoder calls per chunk {s['calls_per_chunk']:.1f} (forward {s['forward_calls_per_chunk']:.1f}, backward "
          f"{s['backward_calls_per_chunk']:.1f}), plus {s['random_calls_per_chunk']:.1f} for the random radius; "
          f"{s['elapsed_s']:.1f} s", file=stream)
    fragile = result.fragile(5)
    if fragile:
        print("  most fragile chunks:", file=stream)
        for i in fragile:
            print(f"    #{i:<6} {result.radius[i]:<9.4g} {result.chunk_text(i)!r}: {result.display(result.from_id[i])!r} → "
                  f"{result.display(result.to_id[i])!r} at position {result.position[i]}", file=stream)


def cmd_worstcase(args: argparse.Namespace) -> int:
    from core.analyses.worstcase import WORST_CASE_FOLDER, WorstCaseSettings, refuse_without_gradients, worst_case
    from core.engine.sweep import DEFAULT_SIGMAS, parse_sigmas
    from core.engine.text import chunk_text
    from core.outputs.files import OutputRefusedError

    settings = WorstCaseSettings(seed=args.seed, repeats=args.repeats,
                                 sigmas=parse_sigmas(args.sigmas) if args.sigmas else DEFAULT_SIGMAS).validated()
    out = Path(args.out)
    if out.exists() and not out.is_dir():
        raise OutputRefusedError(f"{out} is a file, and worst-case results go into a folder; choose another --out.")
    _check_outputs([out], args.force, WORST_CASE_FOLDER, folder=True)
    where = where_from_args(args)
    text, source = _load_text_arg(args.text)
    (codec,) = open_checkpoints([args.checkpoint], args.adapter, where)
    refuse_without_gradients(codec)
    chunks = chunk_text(text, codec, source)
    progress = None if args.quiet else TerminalProgress(f"{codec.name[:16]:<16}")
    predictions = encoded = None
    if args.predictions:
        from core.analyses.prediction_file import check_against, read_predictions
        from core.engine.noise import encode_chunks

        predictions = read_predictions(args.predictions)
        check_against(predictions, codec)
        encoded = encode_chunks(codec, chunks)
    result = worst_case(codec, chunks, settings, progress=progress, text_source=source, encoded=encoded, where=where,
                        adapter=args.adapter)
    if predictions is not None:
        from core.analyses.worstcase import against_generator

        result.generator = against_generator(result, predictions, encoded.mean.numpy())
        result.provenance["predictions"] = predictions.provenance()
    result.write(out, force=args.force)
    print(f"wrote {out}/ (worst_case.json, worst_case.csv)", file=sys.stderr)
    print_worst_case(result)
    if result.generator is not None:
        print(result.generator.line())


def print_predictions(result, stream=None) -> None:
    """The short verdict of `predictions`: the key numbers, then the verdict in words."""
    stream = stream or sys.stdout
    s = result.summary

    def iv(key: str, scale: float = 1.0, digits: str = ".3g") -> str:
        low, high = s.get(f"{key}_low"), s.get(f"{key}_high")
        if s.get(key) is None:
            return "—"
        text = f"{s[key] * scale:{digits}}"
        return text + (f" ({low * scale:{digits}}–{high * scale:{digits}})" if low is not None and high is not None else "")

    print(f"{s['chunks']:,} chunks × {s['samples']} samples, {s['tokens']:,} tokens", file=stream)
    print(f"  effective sigma (data-scale)      {iv('effective_sigma')}", file=stream)
    print(f"  decoded accuracy                  {iv('decoded_accuracy', 100, '.2f')} %", file=stream)
    noise = s["noise_accuracy_at_effective_sigma"]
    print(f"  random noise of that size         {'—' if noise is None else f'{100 * noise:.2f}'} %", file=stream)
    print(f"  structured-error factor           {iv('structured_error_factor')}", file=stream)
    if s["energy_score"] is not None:
        print(f"  energy score (latent units)       {iv('energy_score', 1, '.4g')}", file=stream)
        print(f"  Brier estimate (tokens)           {iv('brier_estimate', 1, '.4g')}", file=stream)
    print(result.verdict, file=stream)


def cmd_predictions(args: argparse.Namespace) -> int:
    from core.analyses.predictions import PREDICTIONS_FOLDER, analyse_predictions, read_predictions

    where = where_from_args(args)
    out = Path(args.out)
    _check_outputs([out], args.force, PREDICTIONS_FOLDER, folder=True)
    predictions = read_predictions(args.predictions)
    (codec,) = open_checkpoints([args.checkpoint], args.adapter, where)
    progress = None if args.quiet else TerminalProgress("sweep" if where.here else "sweep shards")
    result = analyse_predictions(codec, predictions, repeats=args.repeats, seed=args.seed, sweep_progress=progress,
                                 where=where, adapter=args.adapter)
    result.write(out, force=args.force)
    print(f"wrote {out}/ (predictions.json, " + ", ".join(result.csv_files()) + ")", file=sys.stderr)
    print_predictions(result)
    return 0


def _check_report_outputs(out: Path, figures: Path | None, force: bool) -> None:
    """Before any work: the HTML file and the figure folder are free or ours to replace with --force."""
    from core.outputs.report import FIGURES_FOLDER

    _check_targets([(out, is_report_file, False, "--out")]
                   + ([(figures, FIGURES_FOLDER, True, "--figures")] if figures is not None else []), force)


def cmd_train(args: argparse.Namespace) -> int:
    from core.training import train

    return train.run_from_args(args) or 0


def add_sweep_arguments(p: argparse.ArgumentParser, noise_choices=None) -> None:
    from core.engine.noise import NOISE_MODELS
    from core.engine.sweep import DEFAULT_NOISE, DEFAULT_REPEATS, DEFAULT_SEED

    p.add_argument("--text", help="UTF-8 text file to evaluate on (default: the bundled demo text)")
    p.add_argument("--sigmas", help="grid as start:stop:step or a comma list (default: 0 and 24 steps from 0.01 to 2, x1.26 each)")
    p.add_argument("--repeats", type=int, default=DEFAULT_REPEATS, help=f"noise draws per chunk and sigma (default {DEFAULT_REPEATS})")
    p.add_argument("--noise", choices=noise_choices or NOISE_MODELS, default=DEFAULT_NOISE, help=f"noise model (default {DEFAULT_NOISE})")
    p.add_argument("--seed", type=int, default=DEFAULT_SEED, help=f"noise seed (default {DEFAULT_SEED})")
    p.add_argument("--batch", type=int, default=512, help="chunks decoded per batch (rounded to a multiple of 256)")
    p.add_argument("--quiet", action="store_true", help="no progress bar")


DEBUG_HELP = "on an error, print the full traceback after the one-sentence message"


def build_parser() -> argparse.ArgumentParser:
    from core.analyses.compare import COMPARISON_NOISES
    from core.engine.sweep import DEFAULT_REPEATS, DEFAULT_SEED

    parser = argparse.ArgumentParser(
        prog="chunkscope",
        description="Measure how much latent noise a chunk autoencoder can take. With no command, opens the workbench.",
    )
    parser.add_argument("--version", action="version", version=f"chunkscope {core.__version__}")
    parser.add_argument("--screenshot", metavar="PATH", help="open the workbench offscreen, save a PNG of it to PATH and exit")
    parser.add_argument("--view", metavar="NAME", help="with --screenshot: the view to show")
    parser.add_argument("--debug", action="store_true", help=DEBUG_HELP)
    sub = parser.add_subparsers(dest="command", metavar="COMMAND")

    p = sub.add_parser("info", help="describe a checkpoint and its latent health", description="Architecture, sizes, parameter count, sha256, card and latent health of one checkpoint.")
    p.add_argument("checkpoint")
    p.add_argument("--adapter", metavar="SPEC", help=ADAPTER_HELP)
    p.add_argument("--text", help="UTF-8 text file for the latent health (default: the bundled demo text)")
    p.add_argument("--json", action="store_true", help="print JSON instead of text")
    p.set_defaults(func=cmd_info)

    p = sub.add_parser("sweep", help="sweep checkpoints over a sigma grid", description="Encode a text once per checkpoint, then perturb, decode and score it at every sigma; write DIR/<checkpoint>/sweep.json, curves.csv, tokens.csv.")
    p.add_argument("checkpoints", nargs="+", metavar="CKPT")
    p.add_argument("--adapter", metavar="SPEC", help=ADAPTER_HELP)
    add_sweep_arguments(p)
    p.add_argument("--out", default="results", help="output folder (default: results)")
    p.add_argument("--force", action="store_true", help="replace existing output folders")
    add_cluster_arguments(p)
    p.set_defaults(func=cmd_sweep)

    from core.training.recipes import add_arguments as add_train_arguments  # torch-free: --help stays fast

    p = sub.add_parser("train", help="train a sample model from its recipe", description="Rebuild the sample models from the Python standard library's docstrings and comments.")
    add_train_arguments(p)
    p.set_defaults(func=cmd_train, stopped="stopped; checkpoints saved before this point are kept.")

    p = sub.add_parser("compare", help="compare checkpoints on one text, paired", description="Sweep two or more checkpoints on the same text with the same noise seed, under data-scale and isotropic noise; write tolerances side by side, the curves and McNemar tests per sigma.")
    p.add_argument("checkpoints", nargs="+", metavar="CKPT")
    p.add_argument("--adapter", metavar="SPEC", help=ADAPTER_HELP)
    add_sweep_arguments(p, noise_choices=COMPARISON_NOISES)
    p.add_argument("--abs-sigmas", help="grid for the isotropic (absolute) sweep (default: the relative grid times the largest latent RMS)")
    p.add_argument("--out", default="comparison", help="output folder (default: comparison)")
    p.add_argument("--force", action="store_true", help="replace an existing output folder")
    add_cluster_arguments(p)
    p.set_defaults(func=cmd_compare)

    p = sub.add_parser("trend", help="tolerance through a training run (a folder of checkpoints)", description="Sweep every checkpoint in a folder and report accuracy at sigma 0, the 99.9/99/90 % tolerances and loss tolerances, latent RMS, KL and active dimensions against training step (from each card, else from the file name).")
    p.add_argument("folder")
    p.add_argument("--adapter", metavar="SPEC", help=ADAPTER_HELP)
    add_sweep_arguments(p)
    p.add_argument("--out", help="write trend.csv and trend.json into this folder")
    p.add_argument("--force", action="store_true", help="replace existing output files")
    add_cluster_arguments(p)
    p.set_defaults(func=cmd_trend)

    p = sub.add_parser("report", help="one self-contained HTML report", description="Write one self-contained HTML file (inline plots, no outside links) from checkpoints (swept or compared on the text), or from folders written by 'sweep' or 'compare'.")
    p.add_argument("inputs", nargs="*", metavar="INPUT", help="checkpoints, or folders written by 'sweep' / 'compare'")
    p.add_argument("--adapter", metavar="SPEC", help=ADAPTER_HELP)
    add_sweep_arguments(p, noise_choices=COMPARISON_NOISES)
    p.add_argument("--trend", metavar="FOLDER", help="also sweep a folder of training checkpoints")
    p.add_argument("--predictions", metavar="FILE", help="add a Generator errors section for this predictions file "
                   "(made for one of the checkpoints given)")
    p.add_argument("--title", default="chunkscope report")
    p.add_argument("--out", default="report.html", help="the HTML file to write (default: report.html)")
    p.add_argument("--worst-case", action="store_true", help="add a worst-case section per checkpoint (the smallest "
                   "perturbation that changes each chunk, beside the random radius; not for ONNX codecs)")
    p.add_argument("--figures", metavar="DIR", help="also write every figure of the report as DIR/<name>.pdf (with DIR/figures.json naming each)")
    p.add_argument("--force", action="store_true", help="replace an existing report file (and figure folder)")
    add_cluster_arguments(p)
    p.set_defaults(func=cmd_report)

    p = sub.add_parser("worstcase", help="the smallest latent perturbation that changes each chunk",
                       description="Per chunk, search for the smallest perturbation of its mean that changes the decoded "
                                   "chunk (following gradients through the decoder; not for ONNX codecs), verify it, and set "
                                   "it beside the noise norm at which a data-scale sweep with the same seed first breaks the "
                                   "chunk; write DIR/worst_case.json and DIR/worst_case.csv. With --workers or --cluster the "
                                   "chunks are sharded (whole search batches per shard, the same seeds per chunk), and the "
                                   "result is the one of this process.")
    p.add_argument("checkpoint")
    p.add_argument("--adapter", metavar="SPEC", help=ADAPTER_HELP)
    p.add_argument("--text", help="UTF-8 text file to evaluate on (default: the bundled demo text)")
    p.add_argument("--out", default="worst_case", help="output folder (default: worst_case)")
    p.add_argument("--seed", type=int, default=DEFAULT_SEED, help=f"noise seed of the random radius (default {DEFAULT_SEED})")
    p.add_argument("--repeats", type=int, default=DEFAULT_REPEATS, help=f"noise draws per chunk for the random radius (default {DEFAULT_REPEATS})")
    p.add_argument("--sigmas", help="data-scale grid of the random radius (default: the sweep's)")
    p.add_argument("--predictions", metavar="FILE", help="a generator predictions file for the same codec and text: adds "
                   "each chunk's generator error norm and the share of chunks whose worst-case radius is below it")
    p.add_argument("--force", action="store_true", help="replace an existing output folder")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    add_cluster_arguments(p)
    p.set_defaults(func=cmd_worstcase)

    p = sub.add_parser("predictions", help="hold a generator's predicted latents against the decoder's tolerance",
                       description="Decode a generator's predictions (a predictions file, see DESIGN.md) with the codec they "
                       "were made for, sweep the same chunks under data-scale noise, and write DIR/predictions.json and CSVs: "
                       "effective sigma, decoded accuracy, the accuracy random noise of that size gives, the structured-error "
                       "factor, error geometry and, with several samples per chunk, the energy score and Brier estimates.")
    p.add_argument("checkpoint")
    p.add_argument("predictions", metavar="PREDICTIONS", help="a predictions .safetensors file")
    p.add_argument("--adapter", metavar="SPEC", help=ADAPTER_HELP)
    p.add_argument("--repeats", type=int, default=4, help="noise draws per chunk and sigma in the sweep (default 4)")
    p.add_argument("--seed", type=int, default=0, help="noise seed of the sweep (default 0)")
    p.add_argument("--quiet", action="store_true", help="no progress bar")
    p.add_argument("--out", default="predictions", help="output folder (default: predictions)")
    p.add_argument("--force", action="store_true", help="replace an existing output folder")
    add_cluster_arguments(p)
    p.set_defaults(func=cmd_predictions)

    for command in sub.choices.values():  # --debug also after the command; absent there, the top level's value stands
        command.add_argument("--debug", action="store_true", default=argparse.SUPPRESS, help=DEBUG_HELP)
    return parser


def print_debug(exc: BaseException, stream=None) -> None:
    """The full traceback, including the error inside that our sentence replaced (an adapter's
    own exception, which the one-sentence message hides with `from None`)."""
    import traceback

    seen, walked = exc, set()
    while seen is not None and id(seen) not in walked:  # show suppressed context too: the adapter's own frames
        walked.add(id(seen))
        seen.__suppress_context__ = False
        seen = seen.__cause__ or seen.__context__
    traceback.print_exception(type(exc), exc, exc.__traceback__, file=stream or sys.stderr)


def open_workbench(args: argparse.Namespace) -> int:
    try:
        from app.main import run_workbench
    except ImportError as exc:
        print(f"chunkscope: the workbench cannot start ({exc}).", file=sys.stderr)
        return 2
    return run_workbench(screenshot=args.screenshot, view=args.view)


def main(argv: list[str] | None = None) -> int:
    parser = build_parser()
    args = parser.parse_args(argv)
    if args.command is None:
        return open_workbench(args)
    try:
        return int(args.func(args) or 0)
    except (ChunkscopeError, FileExistsError) as exc:
        print(f"chunkscope: {exc}", file=sys.stderr)
        if args.debug:
            print_debug(exc)
        return 2
    except (SweepCancelled, KeyboardInterrupt):  # every other command writes its outputs together at the end, or not at all
        print(f"\nchunkscope: {getattr(args, 'stopped', 'stopped; nothing was written.')}", file=sys.stderr)
        return 130
    except BrokenPipeError:  # output piped into a pager or `head` that stopped reading
        sys.stderr.close()
        return 0


if __name__ == "__main__":
    sys.exit(main())
