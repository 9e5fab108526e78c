"""The virtual SEM: render line/space micrographs from known edge traces.

Each row is one scan across vertical lines.  The expected secondary-electron yield of a row is

``space_level`` outside the lines, ``line_level`` on them, plus a bright Gaussian peak of height
``edge_peak`` and standard deviation ``edge_peak_width_nm`` sitting ``edge_peak_offset_nm`` inside
each edge (the sidewall), all convolved with a Gaussian beam of standard deviation ``blur_nm`` and
integrated over the pixel width (box of one pixel; exact closed forms, no supersampling;
the sloped sidewall of the "trapezoid" family by 16-node quadrature).
Counts are ``dose * yield`` electrons (Poisson when ``shot_noise``), times ``gain``, plus a black
level and Gaussian read noise.  Optional: noise correlated along the scan (AR(1) of coefficient
``scan_correlation``, marginal variance kept), a slow brightness gradient across the field,
row-to-row brightness jitter, a small tilt (a shear of the edges by ``tan(tilt)`` per row; for
angles of a few degrees this is a rotation to within ``1 - cos`` of the angle), dark lines, and
lines running horizontally (the image transposed, so the SEM scan then runs along the lines).

The truth record gives every edge's true position per row (nm, column coordinate with pixel 0's
centre at 0) and the realised roughness after removing a straight line from each trace.
"""
from __future__ import annotations

import math
from dataclasses import asdict, dataclass

import numpy as np
from scipy import signal, special

__all__ = ["SEMSettings", "render_micrograph", "expected_row_profile", "PROFILES"]


@dataclass(frozen=True)
class SEMSettings:
    """Physical settings of the virtual SEM (all lengths in nm).

    Attributes
    ----------
    pixel_size_nm : float
        Pixel size, the same along and across the lines.
    space_level, line_level : float
        Secondary-electron yield of the substrate (spaces) and of the line tops.
    edge_peak : float
        Height of the bright edge peak before blurring, in yield units (0 for none).
    edge_peak_width_nm, edge_peak_offset_nm : float
        Standard deviation of the edge peak and its distance inside the edge.
    blur_nm : float
        Standard deviation of the Gaussian beam (0 for a perfectly sharp beam).
    dose_per_pixel : float
        Primary electrons per pixel; expected counts are ``dose_per_pixel * yield``.
    shot_noise : bool
        Draw Poisson counts (True) or keep expected counts (False).
    gain : float
        Grey levels per counted electron.
    black_level : float
        Grey level added to every pixel (keeps noise above zero in integer files).
    read_noise : float
        Standard deviation of additive Gaussian noise, in grey levels.
    scan_correlation : float
        AR(1) coefficient of the noise along the scan (detector bandwidth), in [0, 1).
    gradient : float
        Relative brightness change from the left to the right border of the field.
    row_jitter : float
        Relative standard deviation of a per-row brightness factor.
    tilt_deg : float
        Tilt of the lines from the vertical, degrees.
    polarity : str
        ``"bright"`` (line tops brighter than the substrate) or ``"dark"`` (levels swapped).
    horizontal : bool
        Return the image transposed, with the lines running along the scan.
    profile : str
        Line-scan family: ``"default"`` (blurred step plus edge peak, above); ``"trapezoid"``
        (the yield climbs linearly over a sloped sidewall of ``sidewall_nm`` from the foot at the
        edge, peak at the top corner); ``"halo"`` (a dark dip of relative depth ``halo`` just
        outside the line foot, as charging or a shadowing detector leave); ``"asymmetric"``
        (the right sidewall ``asymmetry`` times blurrier with a peak ``1 / asymmetry`` as high,
        as from a detector on one side).
    sidewall_nm, halo, asymmetry : float
        Parameters of those families.
    vignetting : float
        Relative brightness loss at the corners of the field (quadratic in the distance from
        the centre).
    quantise_bits : int
        0 for real-valued grey levels; 8 or 16 to round and clip to that many bits (as the
        detector's converter does; file writing converts separately).
    """

    pixel_size_nm: float = 1.0
    space_level: float = 0.3
    line_level: float = 0.6
    edge_peak: float = 0.5
    edge_peak_width_nm: float = 1.5
    edge_peak_offset_nm: float = 2.0
    blur_nm: float = 2.0
    dose_per_pixel: float = 100.0
    shot_noise: bool = True
    gain: float = 1.0
    black_level: float = 100.0
    read_noise: float = 0.0
    scan_correlation: float = 0.0
    gradient: float = 0.0
    row_jitter: float = 0.0
    tilt_deg: float = 0.0
    polarity: str = "bright"
    horizontal: bool = False
    profile: str = "default"
    sidewall_nm: float = 4.0
    halo: float = 0.3
    asymmetry: float = 1.6
    vignetting: float = 0.0
    quantise_bits: int = 0

#: Line-scan families of the renderer (see :class:`SEMSettings`).
PROFILES = ("default", "trapezoid", "halo", "asymmetric")


def _validate_settings(s: SEMSettings) -> None:
    if not s.pixel_size_nm > 0:
        raise ValueError(f"pixel_size_nm={s.pixel_size_nm}: must be > 0")
    for name in ("blur_nm", "edge_peak_width_nm", "dose_per_pixel", "read_noise", "row_jitter"):
        if getattr(s, name) < 0:
            raise ValueError(f"{name}={getattr(s, name)}: must be >= 0")
    if not 0 <= s.scan_correlation < 1:
        raise ValueError(f"scan_correlation={s.scan_correlation}: must be in [0, 1)")
    if s.polarity not in ("bright", "dark"):
        raise ValueError(f"polarity={s.polarity!r}: must be 'bright' or 'dark'")
    if s.profile not in PROFILES:
        raise ValueError(f"profile={s.profile!r}: must be one of {PROFILES}")
    if s.quantise_bits not in (0, 8, 16):
        raise ValueError(f"quantise_bits={s.quantise_bits}: must be 0, 8 or 16")
    if s.sidewall_nm <= 0 or s.asymmetry <= 0 or not 0 <= s.vignetting < 1:
        raise ValueError("sidewall_nm and asymmetry must be > 0 and vignetting in [0, 1)")
    if abs(s.tilt_deg) > 10:
        raise ValueError(f"tilt_deg={s.tilt_deg}: at most 10 degrees (a shear model of a rotation)")


def _box_blurred_step(d_nm: np.ndarray, blur_nm: float, pixel_nm: float) -> np.ndarray:
    """Mean over a pixel of width p centred at distance d past an edge of a blurred unit step."""
    half = 0.5 * pixel_nm
    if blur_nm == 0:
        return (np.clip(d_nm + half, 0, None) - np.clip(d_nm - half, 0, None)) / pixel_nm

    def prim(u):  # antiderivative of Phi(u / b)
        z = u / blur_nm
        return u * special.ndtr(z) + blur_nm * np.exp(-0.5 * z * z) / math.sqrt(2 * math.pi)

    return (prim(d_nm + half) - prim(d_nm - half)) / pixel_nm


def _box_gaussian(d_nm: np.ndarray, sd_nm: float, pixel_nm: float) -> np.ndarray:
    """Mean over a pixel of a unit-area Gaussian of sd ``sd_nm`` centred at distance d."""
    half = 0.5 * pixel_nm
    return (special.ndtr((d_nm + half) / sd_nm) - special.ndtr((d_nm - half) / sd_nm)) / pixel_nm


def expected_row_profile(columns_nm, left_nm, right_nm, settings: SEMSettings) -> np.ndarray:
    """Expected yield (before dose, gain and noise) at column centres ``columns_nm``.

    ``left_nm`` and ``right_nm`` broadcast against ``columns_nm`` (e.g. shapes (rows, 1, lines)
    against (1, cols, 1)); the last axis is summed over lines.

    Examples
    --------
    >>> import numpy as np
    >>> cols = np.arange(64.0)[:, None]                # (cols, lines): one line from 16 to 48 nm
    >>> p = expected_row_profile(cols, np.array([16.0]), np.array([48.0]), SEMSettings(edge_peak=0.0))
    >>> bool(p[32] > p[0])                             # the line is brighter than the space
    True
    """
    s = settings
    hi, lo = (s.line_level, s.space_level) if s.polarity == "bright" else (s.space_level, s.line_level)
    p = s.pixel_size_nm
    x = np.asarray(columns_nm, float)
    blur_r = s.blur_nm * (s.asymmetry if s.profile == "asymmetric" else 1.0)
    if s.profile == "trapezoid":
        # a linear ramp over the sidewall = the mean of blurred steps spread over it (midpoint
        # quadrature, 16 nodes: error well below the noise of any dose)
        t = (np.arange(16) + 0.5) / 16 * s.sidewall_nm
        up = np.mean([_box_blurred_step(x - left_nm - ti, s.blur_nm, p) for ti in t], axis=0)
        down = np.mean([_box_blurred_step(x - right_nm + ti, s.blur_nm, p) for ti in t], axis=0)
        inside = up - down
    else:
        inside = _box_blurred_step(x - left_nm, s.blur_nm, p) - _box_blurred_step(x - right_nm, blur_r, p)
    out = lo + (hi - lo) * inside.sum(axis=-1)
    if s.edge_peak:
        sd = math.hypot(s.edge_peak_width_nm, s.blur_nm)
        sd_r = math.hypot(s.edge_peak_width_nm, blur_r)
        area = s.edge_peak * s.edge_peak_width_nm * math.sqrt(2 * math.pi)
        area_r = area / (s.asymmetry if s.profile == "asymmetric" else 1.0)
        off = s.edge_peak_offset_nm + (s.sidewall_nm if s.profile == "trapezoid" else 0.0)
        peaks = (area * _box_gaussian(x - (left_nm + off), sd, p)
                 + area_r * _box_gaussian(x - (right_nm - off), sd_r, p))
        out = out + peaks.sum(axis=-1)
    if s.profile == "halo":
        # a dip just outside each foot, 1.5 blur widths out, of depth ``halo`` times the contrast
        sd = max(s.blur_nm, 0.5 * p) * 1.5
        dip = s.halo * abs(hi - lo) * sd * math.sqrt(2 * math.pi)
        out = out - dip * (_box_gaussian(x - (left_nm - 1.5 * sd), sd, p)
                           + _box_gaussian(x - (right_nm + 1.5 * sd), sd, p)).sum(axis=-1)
    return out


def _realised_sigma(traces: np.ndarray) -> np.ndarray:
    """Standard deviation (divide by N) after removing a least-squares straight line per row."""
    n = traces.shape[-1]
    t = np.linspace(-1.0, 1.0, n)
    q, _ = np.linalg.qr(np.stack([np.ones(n), t], axis=1))
    z = traces - (traces @ q) @ q.T
    return np.sqrt(np.mean(z * z, axis=-1))


def render_micrograph(left_nm, right_nm, *, n_cols: int, settings: SEMSettings = SEMSettings(),
                      rng: np.random.Generator):
    """Render a line/space micrograph from true edge positions.

    Parameters
    ----------
    left_nm, right_nm : (n_lines, n_rows) array_like
        True left and right edge positions of every line in every row, nm, column coordinate
        with the centre of pixel column 0 at 0 nm, before any tilt.
    n_cols : int
        Number of pixel columns across the lines.
    settings : SEMSettings
    rng : numpy.random.Generator

    Returns
    -------
    pixels : (n_rows, n_cols) ndarray, or (n_cols, n_rows) when ``settings.horizontal``
        Grey levels.
    truth : dict
        ``left_nm``, ``right_nm`` (tilted true positions, (n_lines, n_rows)), ``edge_nm``
        ((2 n_lines, n_rows), edges sorted left to right), ``edge_sigma_nm``,
        ``width_sigma_nm``, ``centre_sigma_nm`` (realised, straight line removed),
        ``cd_nm`` and the settings.

    Examples
    --------
    >>> import numpy as np
    >>> left = np.full((1, 32), 20.0)
    >>> pixels, truth = render_micrograph(left, left + 30, n_cols=72, rng=np.random.default_rng(0))
    >>> pixels.shape, truth["edge_nm"].shape
    ((32, 72), (2, 32))
    """
    _validate_settings(settings)
    s = settings
    left = np.atleast_2d(np.asarray(left_nm, float))
    right = np.atleast_2d(np.asarray(right_nm, float))
    if left.shape != right.shape:
        raise ValueError(f"left_nm {left.shape} and right_nm {right.shape} must have one shape")
    if np.any(right <= left):
        raise ValueError("every right edge must lie to the right of its left edge")
    n_lines, n_rows = left.shape
    if n_cols < 8 or n_rows < 2:
        raise ValueError(f"image of {n_rows} x {n_cols} pixels is too small")
    rows = np.arange(n_rows)
    shear = math.tan(math.radians(s.tilt_deg)) * s.pixel_size_nm * (rows - 0.5 * (n_rows - 1))
    left = left + shear
    right = right + shear
    cols_nm = np.arange(n_cols) * s.pixel_size_nm
    yield_ = np.empty((n_rows, n_cols))
    for start in range(0, n_rows, 256):   # rows in blocks: memory ~ 256 x cols x lines
        sl = slice(start, start + 256)
        yield_[sl] = expected_row_profile(cols_nm[None, :, None], left.T[sl, None, :],
                                          right.T[sl, None, :], s)
    if s.gradient:
        yield_ *= 1.0 + s.gradient * (cols_nm / cols_nm[-1] - 0.5)
    if s.vignetting:
        r2 = ((cols_nm / cols_nm[-1] - 0.5) ** 2)[None, :] + ((rows / max(n_rows - 1, 1) - 0.5) ** 2)[:, None]
        yield_ *= 1.0 - s.vignetting * r2 / 0.5
    if s.row_jitter:
        yield_ *= 1.0 + s.row_jitter * rng.standard_normal((n_rows, 1))
    expected = s.dose_per_pixel * yield_
    noise = np.zeros_like(expected)
    if s.shot_noise:
        noise += rng.poisson(np.clip(expected, 0, None)) - expected
    noise *= s.gain
    if s.read_noise:
        noise += s.read_noise * rng.standard_normal(expected.shape)
    if s.scan_correlation:
        a = s.scan_correlation
        # AR(1) along the scan with unit gain on the variance: y_n = a y_(n-1) + sqrt(1-a^2) x_n,
        # started in its stationary state.
        c = math.sqrt(1 - a * a)
        # started so that the first sample keeps its own variance (stationary from column 0)
        noise, _ = signal.lfilter([c], [1.0, -a], noise, axis=1, zi=(1 - c) * noise[:, :1])
    pixels = s.black_level + s.gain * expected + noise
    if s.quantise_bits:
        pixels = np.clip(np.rint(pixels), 0, 2 ** s.quantise_bits - 1)
    edges = np.empty((2 * n_lines, n_rows))
    edges[0::2], edges[1::2] = left, right
    order = np.argsort(edges.mean(axis=1))
    width = right - left
    truth = {
        "left_nm": left, "right_nm": right, "edge_nm": edges[order],
        "edge_sigma_nm": _realised_sigma(edges[order]),
        "width_sigma_nm": _realised_sigma(width),
        "centre_sigma_nm": _realised_sigma(0.5 * (left + right)),
        "cd_nm": float(width.mean()),
        "n_rows": n_rows, "n_cols": n_cols,
        "orientation": "horizontal" if s.horizontal else "vertical",
        "settings": asdict(s),
    }
    return (pixels.T.copy() if s.horizontal else pixels), truth
