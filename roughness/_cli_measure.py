"""Command-line parsers and runners for measure, compare and demo."""
from __future__ import annotations

import sys
import tomllib
from dataclasses import fields
from pathlib import Path

EXIT_OK, EXIT_USAGE, EXIT_SOME_FAILED = 0, 2, 3


def _add_measure_options(p):
    from ._measure import MeasureSettings

    d = MeasureSettings()
    p.add_argument("--out", required=True, type=Path, help="output folder (created if missing)")
    p.add_argument("--pixel-size", type=float, dest="pixel_size_nm", default=None, metavar="NM",
                   help="pixel size in nm (default: from the TIFF resolution tags; required for PNG)")
    p.add_argument("--settings", type=Path, default=None, metavar="TOML",
                   help="a site recipe: TOML file whose keys are the option names below "
                        "(with underscores); command-line options override it")
    p.add_argument("--detector", choices=["model", "threshold", "slope"], default=None,
                   help=f"edge detector per row (default {d.detector}: profile fit with calibrated uncertainties)")
    p.add_argument("--profile-model", choices=["template", "parametric", "step"], default=None,
                   help=f"edge-profile model of the fit (default {d.profile_model})")
    p.add_argument("--window-px", type=int, default=None,
                   help=f"fit window across each edge, odd number of pixels (default {d.window_px})")
    p.add_argument("--detrend", choices=["linear", "mean", "quadratic", "none"], default=None,
                   help=f"removed from every trace before statistics (default {d.detrend})")
    p.add_argument("--psd-window", choices=["hann", "boxcar"], default=None,
                   help=f"taper of the PSD (default {d.psd_window})")
    p.add_argument("--polarity", choices=["auto", "bright", "dark"], default=None,
                   help="lines brighter or darker than the spaces (default auto = bright)")
    p.add_argument("--orientation", choices=["auto", "vertical", "horizontal"], default=None,
                   help="line direction in the image (default auto)")
    p.add_argument("--threshold-level", type=float, default=None,
                   help=f"level of the threshold detector, fraction 0-1 (default {d.threshold_level})")
    p.add_argument("--resamples", type=int, dest="n_resamples", default=None,
                   help=f"bootstrap resamples for confidence intervals (default {d.n_resamples})")
    p.add_argument("--confidence", type=float, default=None,
                   help=f"confidence level of the intervals (default {d.confidence})")
    p.add_argument("--workers", type=int, default=1, help="worker processes (default 1)")
    p.add_argument("--resume", action="store_true",
                   help="reuse the per-image results kept in OUT/per_image from an earlier or interrupted "
                        "run with the same settings; only the missing images are measured")
    p.add_argument("--no-report", action="store_true", help="write the tables only")
    p.add_argument("--quiet", action="store_true", help="no progress bar and no summary table")


def add_parsers(sub) -> None:
    p = sub.add_parser("measure", help="measure LER/LWR with the image noise removed",
                       description="Measure line-edge and line-width roughness on SEM images of line/space "
                                   "patterns, with the image-noise share taken out.")
    p.add_argument("images", nargs="+", help="image files (TIFF, PNG), folders or glob patterns")
    _add_measure_options(p)
    c = sub.add_parser("compare", help="measure groups of images (recipes, resists, doses) side by side",
                       description="Measure several groups of images and compare their roughness.")
    c.add_argument("--group", action="append", required=True, metavar="NAME=PATTERN",
                   help="a group: its name, '=', and a file, folder or glob pattern; repeat per group")
    _add_measure_options(c)
    d = sub.add_parser("demo", help="run a small invented study end to end",
                       description="Simulate a small fictional resist-qualification study at two electron doses, "
                                   "measure it and write the report.")
    d.add_argument("--out", type=Path, default=Path("quietedge-demo"), help="output folder (default ./quietedge-demo)")


def _settings(args):
    from ._measure import MeasureSettings

    names = {f.name for f in fields(MeasureSettings)}
    given = {}
    if args.settings is not None:
        try:
            given = tomllib.loads(args.settings.read_text())
        except (OSError, tomllib.TOMLDecodeError) as exc:
            raise ValueError(f"{args.settings}: cannot read the settings file ({exc})") from exc
        unknown = set(given) - names
        if unknown:
            raise ValueError(f"{args.settings}: unknown settings {sorted(unknown)}; allowed: {sorted(names)}")
    for name in names:
        val = getattr(args, name, None)
        if val is not None:
            given[name] = val
    return MeasureSettings(**given).validate()


def _print_headline(meas, out):
    df = meas.summary_table()
    cols = ["image", "n_lines", "ler_3sigma_biased_nm", "ler_3sigma_unbiased_nm", "lwr_3sigma_unbiased_nm",
            "noise_fraction", "edge_correlation_length_nm", "status", "warnings"]
    if len(df):
        short = df[cols].copy()
        short["image"] = [Path(n).name for n in short["image"]]
        print(short.to_string(index=False, float_format=lambda x: f"{x:.2f}"))
    if meas.overall is not None:
        v = meas.overall.values
        print(f"\nall images: LER 3sigma unbiased {3 * v['edge_sigma_unbiased_nm']:.2f} nm "
              f"(biased {3 * v['edge_sigma_biased_nm']:.2f}), LWR 3sigma unbiased "
              f"{3 * v['width_sigma_unbiased_nm']:.2f} nm, noise share {100 * v['edge_noise_fraction']:.0f}%")
    print(f"results in {out}" + (f"; {len(meas.failures)} image(s) failed, see failures.csv" if meas.failures else ""))


def _run_measure(args, groups=None):
    from ._measure import measure

    settings = _settings(args)
    if args.workers < 1:
        raise ValueError(f"--workers {args.workers}: must be >= 1")
    meas = measure(None if groups else args.images, groups=groups, settings=settings, workers=args.workers,
                   progress=not args.quiet, cache_dir=args.out / "per_image", resume=args.resume)
    meas.write(args.out, report=not args.no_report)
    if not args.quiet:
        _print_headline(meas, args.out)
    if not meas.images:
        print("quietedge: no image could be measured", file=sys.stderr)
    return EXIT_SOME_FAILED if meas.failures else EXIT_OK


def run(args) -> int:
    if args.command == "measure":
        return _run_measure(args)
    if args.command == "compare":
        groups = {}
        for spec in args.group:
            name, sep, pattern = spec.partition("=")
            if not sep or not name or not pattern:
                print(f"quietedge compare: --group {spec!r}: expected NAME=PATTERN", file=sys.stderr)
                return EXIT_USAGE
            groups.setdefault(name, []).append(pattern)
        return _run_measure(args, groups=groups)
    if args.command == "demo":
        from .demo import run_demo

        return run_demo(args.out)
    return EXIT_USAGE
