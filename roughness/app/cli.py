"""The ``quietedge`` command line: it only parses, checks and calls the Python API.

``main(argv=None) -> int``; exit status :data:`EXIT_OK` (0) when everything was done,
:data:`EXIT_SOME_FAILED` (3) when some images failed (the rest written), :data:`EXIT_USAGE` (2)
for bad usage, including a bad setting.
"""
from __future__ import annotations

import argparse
import sys
import warnings
from dataclasses import fields
from pathlib import Path

from edges.io import FRAME_STACKS
from edges.locate import ORIENTATIONS, POLARITIES
from edges.profiles import PROFILE_MODELS
from edges.render import SEMSettings

from ..psd import DETRENDS, WINDOWS
from .demo import run_demo
from .runner import expand_inputs, measure
from .settings import DETECTORS, EXIT_OK, EXIT_SOME_FAILED, EXIT_USAGE, MeasureSettings, SettingsError
from .simulate import simulate_images
from .tables import groups_table, summary_table

__all__ = ["main", "build_parser"]

# (option, SEMSettings field, type, help) -- every physical setting of the virtual SEM
_SEM_OPTIONS = [
    ("--pixel-size-nm", "pixel_size_nm", float, "pixel size along and across the lines, nm"),
    ("--space-level", "space_level", float, "secondary-electron yield of the substrate (electrons per primary)"),
    ("--line-level", "line_level", float, "secondary-electron yield of the line tops (electrons per primary)"),
    ("--edge-peak", "edge_peak", float, "height of the bright edge peak before blur, yield units (0: none)"),
    ("--edge-peak-width-nm", "edge_peak_width_nm", float, "standard deviation of the edge peak, nm"),
    ("--edge-peak-offset-nm", "edge_peak_offset_nm", float, "distance of the edge peak inside the edge, nm"),
    ("--blur-nm", "blur_nm", float, "standard deviation of the Gaussian beam, nm"),
    ("--dose", "dose_per_pixel", float, "primary electrons per pixel"),
    ("--gain", "gain", float, "grey levels per detected electron"),
    ("--black-level", "black_level", float, "grey level added to every pixel"),
    ("--read-noise", "read_noise", float, "additive Gaussian noise, standard deviation in grey levels"),
    ("--scan-correlation", "scan_correlation", float, "AR(1) coefficient of the noise along the scan, 0 to <1"),
    ("--gradient", "gradient", float, "relative brightness change from left to right border"),
    ("--row-jitter", "row_jitter", float, "relative standard deviation of a per-row brightness factor"),
    ("--tilt-deg", "tilt_deg", float, "tilt of the lines from the scan normal, degrees"),
    ("--line-scan", "profile", str, "line-scan family: default, trapezoid, halo or asymmetric"),
    ("--sidewall-nm", "sidewall_nm", float, "width of the sloped sidewall of the trapezoid family, nm"),
    ("--halo", "halo", float, "depth of the dark halo outside the line foot (halo family), share of the contrast"),
    ("--asymmetry", "asymmetry", float, "blur ratio of right to left sidewall (asymmetric family)"),
    ("--vignetting", "vignetting", float, "relative brightness loss at the corners of the field, 0 to <1"),
    ("--quantise-bits", "quantise_bits", int, "round and clip grey levels to 8 or 16 bits in the detector (0: no)"),
]


def _add_simulate(sub):
    d = SEMSettings()
    p = sub.add_parser("simulate", help="write virtual SEM images of known roughness, with truth JSON",
                       description="Render line/space SEM images with self-affine rough edges and "
                                   "write each image beside a JSON record of its true edges.")
    p.add_argument("--out", required=True, type=Path, help="output folder (created if missing)")
    p.add_argument("--images", type=int, default=1, help="number of images (default 1)")
    p.add_argument("--rows", type=int, default=1024, help="pixel rows, i.e. scan lines (default 1024)")
    p.add_argument("--cols", type=int, default=1024, help="pixel columns (default 1024)")
    p.add_argument("--pitch-nm", type=float, default=64.0, help="line pitch, nm (default 64)")
    p.add_argument("--cd-nm", type=float, default=32.0, help="mean line width (CD), nm (default 32)")
    p.add_argument("--sigma-nm", type=float, default=1.5,
                   help="edge roughness sigma of the infinitely long edge, nm (default 1.5)")
    p.add_argument("--correlation-length-nm", type=float, default=10.0,
                   help="correlation length xi of the self-affine PSD, nm (default 10)")
    p.add_argument("--roughness-exponent", type=float, default=0.6,
                   help="roughness exponent H, 0 < H <= 2 (default 0.6)")
    p.add_argument("--lr-correlation", type=float, default=0.0,
                   help="correlation coefficient of the left and right edges of a line (default 0)")
    for opt, name, typ, text in _SEM_OPTIONS:
        p.add_argument(opt, dest=name, type=typ, default=getattr(d, name),
                       help=f"{text} (default {getattr(d, name)})")
    p.add_argument("--no-shot-noise", action="store_true", help="keep expected counts (no Poisson noise)")
    p.add_argument("--polarity", choices=["bright", "dark"], default="bright",
                   help="bright or dark lines on the substrate (default bright)")
    p.add_argument("--horizontal", action="store_true", help="lines run along the scan (image transposed)")
    p.add_argument("--bit-depth", type=int, choices=[8, 16, 32], default=16,
                   help="8 or 16-bit integers, or 32 for float TIFF (default 16)")
    p.add_argument("--format", choices=["tif", "png"], default="tif", help="file type (default tif)")
    p.add_argument("--seed", type=int, default=0, help="random seed (default 0)")
    p.add_argument("--prefix", default="sim", help="file name prefix (default 'sim')")


def _run_simulate(args) -> int:
    names = {f.name for f in fields(SEMSettings)}
    given = {k: v for k, v in vars(args).items() if k in names}
    given["shot_noise"] = not args.no_shot_noise
    written = simulate_images(
        args.out, n_images=args.images, n_rows=args.rows, n_cols=args.cols, pitch_nm=args.pitch_nm,
        cd_nm=args.cd_nm, sigma_nm=args.sigma_nm, correlation_length_nm=args.correlation_length_nm,
        roughness_exponent=args.roughness_exponent, lr_correlation=args.lr_correlation,
        settings=SEMSettings(**given), file_format=args.format, bit_depth=args.bit_depth, prefix=args.prefix,
        seed=args.seed)
    for w in written:
        print(f"{w.image_path}  ({w.n_edges} edges, realised edge sigma {w.realised_edge_sigma_nm:.3f} nm)")
    return EXIT_OK


def _add_measure_options(p):
    d = MeasureSettings()
    p.add_argument("--out", required=True, type=Path, help="output folder (created if missing)")
    p.add_argument("--pixel-size", type=float, dest="pixel_size_nm", default=None, metavar="NM",
                   help="pixel size in nm (default: from the TIFF resolution tags; required for PNG)")
    p.add_argument("--settings", type=Path, default=None, metavar="TOML",
                   help="a site recipe: TOML file whose keys are the setting names (the options below with "
                        "underscores); command-line options override it")
    p.add_argument("--detector", choices=DETECTORS, default=None,
                   help=f"edge detector per row (default {d.detector}: profile fit with calibrated uncertainties)")
    p.add_argument("--profile-model", choices=PROFILE_MODELS, default=None,
                   help=f"edge-profile model of the fit (default {d.profile_model})")
    p.add_argument("--window-px", type=int, default=None,
                   help=f"fit window across each edge, odd number of pixels (default {d.window_px})")
    p.add_argument("--detrend", choices=tuple(DETRENDS), default=None,
                   help=f"removed from every trace before statistics (default {d.detrend})")
    p.add_argument("--psd-window", choices=WINDOWS, default=None, help=f"taper of the PSD (default {d.psd_window})")
    p.add_argument("--polarity", choices=POLARITIES, default=None,
                   help="lines brighter or darker than the spaces (default auto = bright)")
    p.add_argument("--orientation", choices=ORIENTATIONS, default=None, help="line direction in the image (default auto)")
    p.add_argument("--threshold-level", type=float, default=None,
                   help=f"level of the threshold detector, fraction 0-1 (default {d.threshold_level})")
    p.add_argument("--resamples", type=int, dest="n_resamples", default=None,
                   help=f"bootstrap resamples for confidence intervals (default {d.n_resamples})")
    p.add_argument("--confidence", type=float, default=None,
                   help=f"confidence level of the intervals (default {d.confidence})")
    p.add_argument("--crop-px", type=int, nargs=4, dest="crop_px", default=None,
                   metavar=("TOP", "BOTTOM", "LEFT", "RIGHT"),
                   help="pixels cut from each side of every image before measuring (a region of interest)")
    p.add_argument("--frame-stack", choices=FRAME_STACKS, dest="frame_stack", default=None,
                   help="a TIFF holding several frames: refuse it (default) or average its frames (already aligned)")
    p.add_argument("--frames", type=int, default=None,
                   help=f"frames averaged into each image as acquired, for the frames-needed advice (default {d.frames})")
    p.add_argument("--noise-share-target", type=float, dest="noise_share_target", default=None, metavar="FRACTION",
                   help="noise share of the variance above which a result is flagged and the frames needed are "
                        f"given (default {d.noise_share_target}: {100 * (1 / (1 - d.noise_share_target) ** 0.5 - 1):.1f}%% "
                        "inflation of 3-sigma)")
    p.add_argument("--workers", type=int, default=1,
                   help="worker processes, at most the cores (default 1); with --dask local, the cluster's")
    p.add_argument("--dask", default=None, metavar="ADDRESS",
                   help="run the per-image work on a Dask cluster: 'local' starts one here, or give a scheduler "
                        "address such as tcp://scheduler:8786 (needs pip install 'quietedge[dask]'; image paths "
                        "must be readable by the workers)")
    p.add_argument("--resume", action="store_true",
                   help="reuse the per-image results kept in OUT/per_image from an earlier or interrupted "
                        "run with the same settings; only the missing images are measured")
    p.add_argument("--no-report", action="store_true", help="write the tables only")
    p.add_argument("--quiet", action="store_true", help="no progress bar and no summary table")


def _add_measure(sub):
    p = sub.add_parser("measure", help="measure LER/LWR with the image noise removed",
                       description="Measure line-edge and line-width roughness on SEM images of line/space "
                                   "patterns, with the image-noise share taken out.")
    p.add_argument("images", nargs="+", help="image files (TIFF, PNG), folders or glob patterns")
    _add_measure_options(p)
    c = sub.add_parser("compare", help="measure groups of images (recipes, resists, doses) side by side",
                       description="Measure several groups of images and compare their roughness.")
    c.add_argument("--group", action="append", required=True, metavar="NAME=PATTERN",
                   help="a group: its name, '=', and a file, folder or quoted glob pattern, or an earlier "
                        "quietedge output folder (its results are reused, not re-fitted); repeat per group")
    c.add_argument("--effect", type=float, dest="effect_3sigma_nm", default=None, metavar="NM",
                   help="difference of unbiased 3-sigma (nm) to plan the number of images for "
                        "(default 10%% of the mean unbiased 3-sigma LER)")
    _add_measure_options(c)
    d = sub.add_parser("demo", help="run a small invented study end to end",
                       description="Simulate a small fictional resist-qualification study at two electron doses, "
                                   "measure it and write the report.")
    d.add_argument("--out", type=Path, default=Path("quietedge-demo"), help="output folder (default ./quietedge-demo)")


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="quietedge",
        description="Line-edge and line-width roughness from SEM images, with the image noise taken out.")
    parser.add_argument("--debug", action="store_true",
                        help="show numerical warnings and the full traceback of an error")
    parser.add_argument("--version", action="version", version=f"quietedge {_version()}")
    sub = parser.add_subparsers(dest="command", required=True)
    _add_simulate(sub)
    _add_measure(sub)
    sub.add_parser("columns", help="print every column of every output table with its unit and meaning",
                   description="The data dictionary of summary.csv, groups.csv, edges.csv, compare.csv, psd.csv "
                               "and failures.csv.")
    return parser


def _version() -> str:
    from importlib.metadata import PackageNotFoundError, version

    try:
        return version("quietedge")
    except PackageNotFoundError:      # a source tree that is not installed
        return "unknown"


def _settings(args) -> MeasureSettings:
    given = {name: getattr(args, name) for name in MeasureSettings.field_names()
             if getattr(args, name, None) is not None}
    if args.settings is not None:
        return MeasureSettings.from_toml(args.settings, **given)
    return MeasureSettings(**given)


def _print_headline(meas, out):
    df = summary_table(meas)
    cols = ["image", "n_lines", "ler_3sigma_biased_nm", "ler_3sigma_unbiased_nm", "lwr_3sigma_unbiased_nm",
            "noise_fraction", "edge_correlation_length_nm", "status", "warnings"]
    if len(df):
        short = df[cols].copy()
        short["image"] = [Path(n).name for n in short["image"]]
        print(short.to_string(index=False, float_format=lambda x: f"{x:.2f}"))
    if meas.overall is not None:
        v = meas.overall.summary
        print(f"\nall images: LER 3sigma unbiased {3 * v.edge.sigma_unbiased_nm:.2f} nm "
              f"(biased {3 * v.edge.sigma_biased_nm:.2f}), LWR 3sigma unbiased "
              f"{3 * v.width.sigma_unbiased_nm:.2f} nm, noise fraction {100 * v.edge.noise_fraction:.0f}% "
              "of the edge variance")
    print(f"results in {out}" + (f"; {len(meas.failures)} image(s) failed, see failures.csv" if meas.failures else ""))


def _run_measure(args) -> int:
    settings = _settings(args)
    if args.workers < 1:
        raise SettingsError(f"--workers {args.workers}: must be >= 1")
    given = list(args.images)
    found = [p for p in expand_inputs(given) if Path(p).is_file()]
    if not found:
        raise SettingsError("no images found in " + ", ".join(repr(str(g)) for g in given) +
                            " (a folder must hold .tif, .tiff or .png files; quote patterns so that "
                            "quietedge expands them)")
    meas = measure(args.images, settings=settings, workers=args.workers, dask=args.dask,
                   progress=not args.quiet, cache_dir=args.out / "per_image", resume=args.resume)
    meas.write(args.out, report=not args.no_report)
    if not args.quiet:
        _print_headline(meas, args.out)
    if not meas.images:
        print("quietedge: no image could be measured:", file=sys.stderr)
        for name, reason in meas.failures[:10]:
            print(f"  {reason}" if str(name) in str(reason) else f"  {name}: {reason}", file=sys.stderr)
        if len(meas.failures) > 10:
            print(f"  ... and {len(meas.failures) - 10} more in failures.csv", file=sys.stderr)
    return EXIT_SOME_FAILED if meas.failures else EXIT_OK


def _groups(specs) -> dict:
    groups = {}
    for spec in specs:
        name, sep, pattern = spec.partition("=")
        name = name.strip()
        if not sep or not name or not pattern:
            raise SettingsError(f"--group {spec!r}: expected NAME=PATTERN (quote the pattern: --group 'A=imgs/a_*.tif')")
        if name in groups:
            raise SettingsError(f"--group {spec!r}: the name {name!r} is given twice; give each group one name "
                                "and one pattern, or a folder")
        if name.lower() == "all":
            raise SettingsError(f"--group {spec!r}: 'all' is the name of every image together; choose another")
        groups[name] = [pattern]
    if len(groups) < 2:
        raise SettingsError("compare needs at least two --group options")
    return groups


def _run_compare(args) -> int:
    from .comparing import comparison_sentences, compare, noise_sentences, power_sentences

    settings = _settings(args)
    if args.workers < 1:
        raise SettingsError(f"--workers {args.workers}: must be >= 1")
    groups = _groups(args.group)
    meas = compare(groups, settings=settings, out=args.out, effect_3sigma_nm=args.effect_3sigma_nm,
                   workers=args.workers, progress=not args.quiet, resume=args.resume, report=not args.no_report,
                   dask=args.dask)
    c = meas.comparison
    if not args.quiet and meas.groups:
        df = groups_table(meas)
        cols = ["group", "n_images", "n_lines", "ler_3sigma_unbiased_nm", "ler_3sigma_unbiased_low_nm",
                "ler_3sigma_unbiased_high_nm", "ler_3sigma_biased_nm", "lwr_3sigma_unbiased_nm",
                "lwr_3sigma_biased_nm", "noise_fraction", "ler_noise_inflation"]
        print(df[cols].to_string(index=False, float_format=lambda x: f"{x:.2f}"))
    if c is not None:
        print()
        for text in comparison_sentences(c) + [t for t in noise_sentences(c) if "above" in t] + power_sentences(c):
            print(text)
        for code, text in c.notes:
            print(f"note ({code}): {text}")
    else:
        measured = {g.name for g in meas.groups}
        missing = [g for g in groups if g not in measured]
        print(f"quietedge compare: no comparison: no image of group(s) {', '.join(missing)} could be measured "
              "(see failures.csv)", file=sys.stderr)
    print(f"results in {args.out}" + (f"; {len(meas.failures)} image(s) failed, see failures.csv" if meas.failures
                                      else ""))
    if c is None:
        return EXIT_SOME_FAILED
    return EXIT_SOME_FAILED if meas.failures else EXIT_OK


def main(argv=None) -> int:
    """Run the command line; returns the exit status."""
    parser = build_parser()
    try:
        args = parser.parse_args(argv)
    except SystemExit as exc:   # argparse exits 2 on bad usage, 0 on --help
        return int(exc.code or 0)
    with warnings.catch_warnings():
        if not args.debug:
            # numerical warnings of NaN rows and empty reductions are expected and accounted for
            # (reason codes, "not determined"); they are not for a process engineer's terminal
            warnings.simplefilter("ignore", RuntimeWarning)
            # notes for the user (a colour file converted, a calibration overridden) as plain
            # lines, without Python's file and line, for every file
            warnings.simplefilter("always", UserWarning)
            warnings.showwarning = (lambda message, category, filename, lineno, file=None, line=None:
                                    print(f"quietedge: note: {message}", file=sys.stderr))
        try:
            if args.command == "simulate":
                return _run_simulate(args)
            if args.command == "measure":
                return _run_measure(args)
            if args.command == "compare":
                return _run_compare(args)
            if args.command == "columns":
                from .columns import dictionary_text

                print(dictionary_text())
                return EXIT_OK
            return run_demo(args.out)
        except (ValueError, OSError) as exc:
            if args.debug:
                raise
            print(f"quietedge {args.command}: {exc}", file=sys.stderr)
            return EXIT_USAGE


if __name__ == "__main__":
    sys.exit(main())
