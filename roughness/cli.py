"""The ``quietedge`` command line: a thin layer over the Python API.

``main(argv=None) -> int`` parses, checks paths and calls the public functions; exit status 0
when everything was done, 3 when some images failed (the rest written), 2 for bad usage.
"""
from __future__ import annotations

import argparse
import sys
from dataclasses import fields
from pathlib import Path

import numpy as np

__all__ = ["main"]

EXIT_OK, EXIT_USAGE, EXIT_SOME_FAILED = 0, 2, 3

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
]


def _add_simulate(sub):
    from edges.render import SEMSettings

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
    from edges.io import write_micrograph, write_truth
    from edges.render import SEMSettings

    from .synth import simulate_line_space

    names = {f.name for f in fields(SEMSettings)}
    given = {k: v for k, v in vars(args).items() if k in names}
    given["shot_noise"] = not args.no_shot_noise
    settings = SEMSettings(**given)
    if args.format == "png" and args.bit_depth == 32:
        print("quietedge simulate: PNG holds 8 or 16-bit data; use --format tif for --bit-depth 32",
              file=sys.stderr)
        return EXIT_USAGE
    args.out.mkdir(parents=True, exist_ok=True)
    rng = np.random.default_rng(args.seed)
    for i in range(args.images):
        pixels, truth = simulate_line_space(
            n_rows=args.rows, n_cols=args.cols, pitch_nm=args.pitch_nm, cd_nm=args.cd_nm,
            sigma_nm=args.sigma_nm, correlation_length_nm=args.correlation_length_nm,
            roughness_exponent=args.roughness_exponent, lr_correlation=args.lr_correlation,
            settings=settings, rng=rng)
        stem = args.out / f"{args.prefix}_{i:03d}"
        image = write_micrograph(stem.with_suffix("." + args.format), pixels,
                                 pixel_size_nm=settings.pixel_size_nm, bit_depth=args.bit_depth)
        write_truth(stem.with_suffix(".truth.json"), truth)
        print(f"{image}  ({truth['edge_nm'].shape[0]} edges, realised edge sigma "
              f"{np.sqrt(np.mean(truth['edge_sigma_nm'] ** 2)):.3f} nm)")
    return EXIT_OK


def build_parser() -> argparse.ArgumentParser:
    parser = argparse.ArgumentParser(
        prog="quietedge",
        description="Line-edge and line-width roughness from SEM images, with the image noise taken out.")
    sub = parser.add_subparsers(dest="command", required=True)
    _add_simulate(sub)
    from . import _cli_measure

    _cli_measure.add_parsers(sub)
    return parser


def main(argv=None) -> int:
    parser = build_parser()
    try:
        args = parser.parse_args(argv)
    except SystemExit as exc:   # argparse exits 2 on bad usage, 0 on --help
        return int(exc.code or 0)
    try:
        if args.command == "simulate":
            return _run_simulate(args)
        from . import _cli_measure

        return _cli_measure.run(args)
    except (ValueError, OSError) as exc:
        print(f"quietedge {args.command}: {exc}", file=sys.stderr)
        return EXIT_USAGE


if __name__ == "__main__":
    sys.exit(main())
