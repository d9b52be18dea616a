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

    The time left is shown only once `ETA_AFTER` of the work is done: before that, an
    estimate from the first few batches (which include warm-up) means nothing."""

    ETA_AFTER = 0.05

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
        self.eta_shown = False

    _EARLY = "{desc} {percentage:5.1f}%|{bar}| {elapsed} elapsed"
    _LATER = "{desc} {percentage:5.1f}%|{bar}| {elapsed} elapsed, {remaining} left"

    def __call__(self, done: int, total: int) -> None:
        from tqdm import tqdm

        if self.bar is None or self.bar.total != total:
            if self.bar is not None:
                self.bar.close()
            # smoothing=0: the rate is the average since the start, steadier than a moving average
            self.bar = tqdm(total=total, desc=self.label, file=self.stream, mininterval=self.mininterval, miniters=1,
                            smoothing=0, bar_format=self._EARLY, leave=True, **self.size)
            self.eta_shown = False
        if not self.eta_shown and total and done / total >= self.ETA_AFTER:
            self.bar.bar_format = self._LATER
            self.eta_shown = True
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


def announce_adapter(adapter: str | None, paths, stream=None) -> None:
    """Before any adapter code runs: one line naming the file whose code runs, and its sha256."""
    if not adapter:
        return
    from core.codecs.adapter import adapter_identity
    from core.codecs.open import uses_adapter

    if not any(Path(p).exists() and uses_adapter(p) for p in paths):  # a missing checkpoint is refused before any code runs
        return
    what, sha = adapter_identity(adapter)
    print(f"chunkscope: running the adapter code in {what}" + (f" (sha256 {sha})" if sha else ""), file=stream or sys.stderr)


def open_checkpoints(paths, adapter: str | None = None) -> list:
    from core.codecs.open import open_checkpoint

    paths = list(paths)
    announce_adapter(adapter, paths)
    return [open_checkpoint(p, adapter) for p in paths]


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


def _already_exist(paths: list[Path]) -> ChunkscopeError:
    if len(paths) == 1:
        return ChunkscopeError(f"{paths[0]} already exists; pass --force to replace it, or choose another --out.")
    listed = ", ".join(str(p) for p in paths[:-1]) + f" and {paths[-1]}"
    return ChunkscopeError(f"{listed} already exist; pass --force to replace them, or choose another --out.")


def _check_outputs(targets: list[Path], force: bool, recognise, folder: bool) -> None:
    """Before any work: each target is free or replaceable, and its folder can be written."""
    from core.outputs.files import OutputExistsError, check_target, check_writable

    existing = []
    for target in targets:
        try:
            check_target(target, force, recognise, folder=folder)
        except OutputExistsError:
            existing.append(target)
    if existing:
        raise _already_exist(existing)
    for target in targets:
        check_writable(target)


def cmd_sweep(args: argparse.Namespace) -> int:
    from core.engine.sweep import SWEEP_FOLDER, run_sweep
    from core.engine.text import chunk_text
    from core.outputs.files import OutputRefusedError, Outputs

    settings = _settings_from_args(args)
    out = Path(args.out)
    if out.exists() and not out.is_dir():
        raise OutputRefusedError(f"{out} is a file, and sweep results go into a folder; choose another --out.")
    text, source = _load_text_arg(args.text)
    codecs = open_checkpoints(args.checkpoints, args.adapter)
    names = [c.name for c in codecs]
    if len(set(names)) != len(names):
        raise ChunkscopeError("two checkpoints share a file name, so their output folders would collide; rename one.")
    targets = [out / name for name in names]
    _check_outputs(targets, args.force, SWEEP_FOLDER, folder=True)
    for codec in codecs:
        settings.validated(codec)
    results = []
    for codec in codecs:
        chunks = chunk_text(text, codec, source)
        progress = TerminalProgress(f"{codec.name[:16]:<16}") if not args.quiet else None
        result = run_sweep(codec, chunks, settings, progress=progress, text_source=source)
        results.append(result)
        print(f"swept {codec.name} ({result.decoded_chunks:,} decoded chunks in {result.elapsed_s:.1f}s)", file=sys.stderr)
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


def _comparison_from_args(args, codecs, text, source, progress=None):
    from core.analyses.compare import compare_codecs
    from core.engine.sweep import parse_sigmas

    settings = _settings_from_args(args)
    absolute = parse_sigmas(args.abs_sigmas) if getattr(args, "abs_sigmas", None) else None
    return compare_codecs(codecs, text, sigmas=settings.sigmas, absolute_sigmas=absolute, repeats=settings.repeats,
                          seed=settings.seed, main_noise=settings.noise, text_source=source, progress=progress)


def cmd_compare(args: argparse.Namespace) -> int:
    from core.analyses.compare import COMPARE_FOLDER

    _settings_from_args(args)
    out = Path(args.out)
    _check_outputs([out], args.force, COMPARE_FOLDER, folder=True)
    text, source = _load_text_arg(args.text)
    codecs = open_checkpoints(args.checkpoints, args.adapter)
    if len({c.name for c in codecs}) != len(codecs):
        raise ChunkscopeError("two checkpoints share a file name; rename one so the results can be told apart.")
    progress = None if args.quiet else TerminalProgress("compare")
    comparison = _comparison_from_args(args, codecs, text, source, progress)
    comparison.write(out, force=args.force)
    print(f"wrote {out}/ (compare.json, tolerances.csv, paired.csv, sweeps/)", file=sys.stderr)
    print_comparison(comparison)
    return 0


def cmd_trend(args: argparse.Namespace) -> int:
    from core.analyses.trend import check_trend_output, checkpoints_in, trend, write_trend
    from core.outputs.files import OutputExistsError

    settings = _settings_from_args(args)
    paths = checkpoints_in(args.folder, args.adapter)  # a missing or empty folder is said before the table starts
    out = Path(args.out) if args.out else None
    if out is not None:
        try:
            check_trend_output(out, args.force)
        except OutputExistsError as exc:
            raise _already_exist([exc.path]) from None
    text, source = _load_text_arg(args.text)
    from core.engine.tolerance import ABSOLUTE, LOSS, LOSS_LEVELS, TOLERANCE_LEVELS, level_percent

    announce_adapter(args.adapter, paths)
    points = []
    levels = [(ABSOLUTE, level) for level in TOLERANCE_LEVELS] + [(LOSS, level) for level in LOSS_LEVELS]
    print(f"{'':<48}{'accuracy ≥':<34}loss ≤")
    print(f"{'checkpoint':<28} {'step':>8} {'acc@σ=0':>9} " + " ".join(f"{level_percent(lv, k):>10}" for k, lv in levels[:3])
          + "  " + " ".join(f"{level_percent(lv, k):>10}" for k, lv in levels[3:])
          + f" {'lat. RMS':>9} {'KL nats':>9} {'active':>7}")
    for point in trend(args.folder, text, settings, text_source=source, adapter=args.adapter):
        points.append(point)
        if point.error:
            print(f"{point.name[:28]:<28} {'' if point.step is None else point.step:>8} failed: {point.error}")
            continue
        tols = [point.tolerance(level, kind) for kind, level in levels]
        cells = [f"{'—' if t is None else t.label():>10}" for t in tols]
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
    from core.outputs.files import write_text_atomic
    from core.outputs.report import build_report
    from core.engine.sweep import read_sweep, run_sweep
    from core.engine.text import chunk_text
    from core.analyses.trend import checkpoints_in, trend

    out = Path(args.out)
    if not args.inputs and not args.trend:
        raise ChunkscopeError("give checkpoints or result folders to report on, or --trend FOLDER.")
    settings = _settings_from_args(args)
    _check_outputs([out], args.force, is_report_file, folder=False)
    sweeps, comparison, points = [], None, []
    paths = [Path(p) for p in args.inputs]
    from core.codecs.onnx import is_onnx_codec

    def is_result_folder(p: Path) -> bool:
        return p.is_dir() and not is_onnx_codec(p) and ((p / "compare.json").exists() or (p / "sweep.json").exists() or not args.adapter)

    folders = [p for p in paths if is_result_folder(p)]
    files = [p for p in paths if not is_result_folder(p)]
    for folder in folders:
        if (folder / "compare.json").exists():
            comparison = read_comparison(folder)
        else:
            sweeps.append(read_sweep(folder))
    if files or args.trend:
        text, source = _load_text_arg(args.text)
    if files:
        codecs = open_checkpoints(files, args.adapter)
        if len(codecs) >= 2:
            comparison = _comparison_from_args(args, codecs, text, source, None if args.quiet else TerminalProgress("compare"))
        else:
            chunks = chunk_text(text, codecs[0], source)
            sweeps.append(run_sweep(codecs[0], chunks, settings, text_source=source, progress=None if args.quiet else TerminalProgress(codecs[0].name[:16])))
    if args.trend:
        if not files:
            announce_adapter(args.adapter, checkpoints_in(args.trend, args.adapter))
        points = list(trend(args.trend, text, settings, text_source=source, adapter=args.adapter))
    html = build_report(sweeps=sweeps, comparison=comparison, trend_points=points, trend_noise=settings.noise, title=args.title)
    write_text_atomic(out, html, force=args.force, recognise=is_report_file)
    print(f"wrote {out} ({len(html) / 1024:.0f} KiB, self-contained)", file=sys.stderr)
    return 0


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


def build_parser() -> argparse.ArgumentParser:
    from core.analyses.compare import COMPARISON_NOISES

    parser = argparse.ArgumentParser(
        prog="chunkscope",
        description="Measure how much latent noise a chunk autoencoder can take. With no command, opens the workbench.",
    )
    parser.add_argument("--version", action="version", version=f"chunkscope {core.__version__}")
    parser.add_argument("--screenshot", metavar="PATH", help="open the workbench offscreen, save a PNG of it to PATH and exit")
    parser.add_argument("--view", metavar="NAME", help="with --screenshot: the view to show")
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
    p.set_defaults(func=cmd_compare)

    p = sub.add_parser("trend", help="tolerance through a training run (a folder of checkpoints)", description="Sweep every checkpoint in a folder and report accuracy at sigma 0, the 99.9/99/90 % tolerances and loss tolerances, latent RMS, KL and active dimensions against training step (from each card, else from the file name).")
    p.add_argument("folder")
    p.add_argument("--adapter", metavar="SPEC", help=ADAPTER_HELP)
    add_sweep_arguments(p)
    p.add_argument("--out", help="write trend.csv and trend.json into this folder")
    p.add_argument("--force", action="store_true", help="replace existing output files")
    p.set_defaults(func=cmd_trend)

    p = sub.add_parser("report", help="one self-contained HTML report", description="Write one self-contained HTML file (inline plots, no outside links) from checkpoints (swept or compared on the text), or from folders written by 'sweep' or 'compare'.")
    p.add_argument("inputs", nargs="*", metavar="INPUT", help="checkpoints, or folders written by 'sweep' / 'compare'")
    p.add_argument("--adapter", metavar="SPEC", help=ADAPTER_HELP)
    add_sweep_arguments(p, noise_choices=COMPARISON_NOISES)
    p.add_argument("--trend", metavar="FOLDER", help="also sweep a folder of training checkpoints")
    p.add_argument("--title", default="chunkscope report")
    p.add_argument("--out", default="report.html", help="the HTML file to write (default: report.html)")
    p.add_argument("--force", action="store_true", help="replace an existing file")
    p.set_defaults(func=cmd_report)
    return parser


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
    except ChunkscopeError as exc:
        print(f"chunkscope: {exc}", file=sys.stderr)
        return 2
    except FileExistsError as exc:
        print(f"chunkscope: {exc}", file=sys.stderr)
        return 2
    except (SweepCancelled, KeyboardInterrupt):  # every other command writes its outputs together at the end, or not at all
        print(f"\nchunkscope: {getattr(args, 'stopped', 'stopped; nothing was written.')}", file=sys.stderr)
        return 130
    except BrokenPipeError:  # output piped into a pager or `head` that stopped reading
        sys.stderr.close()
        return 0


if __name__ == "__main__":
    sys.exit(main())
