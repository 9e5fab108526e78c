"""Power spectral density of edge, width and centre traces.

Convention (one-sided): for a detrended trace z of N samples spaced dy nm,
window w normalised by sum(w^2),

    P1_k = 2 dy |sum_n w_n z_n exp(-2 pi i k n / N)|^2 / sum_n w_n^2,   f_k = k / (N dy),

with bins 0 and N/2 (N even) not doubled.  Units: nm^3 against cycles per nm.  With the boxcar
window sum_k P1_k df equals the mean square of z (Parseval); with a window it holds in
expectation as a w^2-weighted variance, and a white noise of variance s^2 has level 2 dy s^2
whatever the window.  This is ``scipy.signal.periodogram(z, fs=1/dy, window=..., detrend=False,
scaling="density")`` for the periodic Hann window.
"""
from __future__ import annotations

from dataclasses import dataclass

import numpy as np
from scipy import signal

__all__ = ["DETRENDS", "WINDOWS", "detrend_basis", "detrend", "window_values", "periodogram",
           "cross_periodogram", "bridge_gaps", "PreparedTraces", "choose_rows"]

#: Detrend name -> polynomial order removed (None: nothing removed).
DETRENDS = {"linear": 1, "mean": 0, "quadratic": 2, "none": None}

#: PSD tapers: the periodic Hann window (scipy's default) and none.
WINDOWS = ("hann", "boxcar")


def _validate_detrend(detrend_):
    if detrend_ not in DETRENDS:
        raise ValueError(f"detrend={detrend_!r}: must be one of {sorted(DETRENDS)}")


def detrend_basis(n_rows: int, detrend_: str) -> np.ndarray:
    """Orthonormal (n_rows, p) basis Q of the removed polynomials (Legendre columns, QR).

    Examples
    --------
    >>> import numpy as np
    >>> q = detrend_basis(100, "linear")
    >>> q.shape, bool(np.allclose(q.T @ q, np.eye(2)))
    ((100, 2), True)
    """
    _validate_detrend(detrend_)
    order = DETRENDS[detrend_]
    if order is None:
        return np.zeros((n_rows, 0))
    t = np.linspace(-1.0, 1.0, n_rows)
    q, _ = np.linalg.qr(np.polynomial.legendre.legvander(t, order))
    return q


def detrend(traces, detrend_: str = "linear"):
    """Remove a least-squares polynomial from each row of ``traces`` ((..., n_rows)).

    Examples
    --------
    >>> import numpy as np
    >>> bool(np.allclose(detrend(np.arange(10.0) * 2 + 5, "linear"), 0))
    True
    """
    x = np.asarray(traces, float)
    q = detrend_basis(x.shape[-1], detrend_)
    return x - (x @ q) @ q.T


def window_values(n_rows: int, window: str) -> np.ndarray:
    """The taper's values for ``n_rows`` samples (``"hann"``: periodic, as scipy.signal.get_window).

    Examples
    --------
    >>> window_values(4, "hann").tolist()
    [0.0, 0.5, 1.0, 0.5]
    """
    if window == "boxcar":
        return np.ones(n_rows)
    if window == "hann":
        return signal.get_window("hann", n_rows)       # periodic Hann, scipy's default
    raise ValueError(f"window={window!r}: must be 'hann' or 'boxcar'")


def periodogram(z, *, row_spacing_nm: float, window: str = "hann"):
    """One-sided density periodogram of each (already detrended) trace.

    Parameters
    ----------
    z : (..., n_rows) array_like
        Traces in nm.
    row_spacing_nm : float
    window : {"hann", "boxcar"}

    Returns
    -------
    frequency_per_nm : (n_rows // 2 + 1,) ndarray
    psd_nm3 : (..., n_rows // 2 + 1) ndarray

    Examples
    --------
    Parseval with the boxcar window: the PSD integrates to the mean square.

    >>> import numpy as np
    >>> z = np.random.default_rng(0).normal(size=256)
    >>> f, p = periodogram(z, row_spacing_nm=0.5, window="boxcar")
    >>> bool(np.isclose(p.sum() * f[1], np.mean(z ** 2)))
    True
    """
    z = np.asarray(z, float)
    n = z.shape[-1]
    if not row_spacing_nm > 0:
        raise ValueError(f"row_spacing_nm={row_spacing_nm}: must be > 0")
    w = window_values(n, window)
    spec = np.fft.rfft(z * w, axis=-1)
    p = row_spacing_nm * np.abs(spec) ** 2 / np.sum(w ** 2)
    if n % 2 == 0:
        p[..., 1:-1] *= 2.0
    else:
        p[..., 1:] *= 2.0
    return np.fft.rfftfreq(n, row_spacing_nm), p


def cross_periodogram(za, zb, *, row_spacing_nm: float, window: str = "hann"):
    """Real part of the one-sided cross-PSD of paired traces (nm^3); sum times df is cov.

    Examples
    --------
    >>> import numpy as np
    >>> z = np.random.default_rng(0).normal(size=128)
    >>> p = cross_periodogram(z, z, row_spacing_nm=1.0, window="boxcar")
    >>> bool(np.isclose(p.sum() / 128, np.mean(z ** 2)))
    True
    """
    n = za.shape[-1]
    w = window_values(n, window)
    sa, sb = np.fft.rfft(za * w, axis=-1), np.fft.rfft(zb * w, axis=-1)
    p = row_spacing_nm * np.real(np.conj(sa) * sb) / np.sum(w ** 2)
    if n % 2 == 0:
        p[..., 1:-1] *= 2.0
    else:
        p[..., 1:] *= 2.0
    return p


@dataclass(frozen=True)
class PreparedTraces:
    """Edge traces with short gaps bridged, ready for spectra and variances.

    Attributes
    ----------
    position_nm, sigma_nm : (n_edges, n_rows) ndarray
        Bridged positions and their 1-sigma noise (interpolated rows carry
        sqrt((1-t)^2 s_a^2 + t^2 s_b^2)); NaN rows remain only in excluded edges.
    usable : (n_edges,) ndarray of bool
    exclusion : (n_edges,) ndarray of str
        ``""``, ``"too_many_invalid_rows"``, ``"gap_too_long"`` or the edge's own flag.
    bridged_rows : (n_edges,) ndarray of int
    """

    position_nm: np.ndarray
    sigma_nm: np.ndarray
    usable: np.ndarray
    exclusion: np.ndarray
    bridged_rows: np.ndarray


def _bridgeable(valid_rows, max_gap_rows, max_invalid_fraction) -> bool:
    bad = ~valid_rows
    if not bad.any():
        return True
    if bad.mean() > max_invalid_fraction:
        return False
    change = np.diff(np.r_[0, bad.astype(int), 0])
    return int(np.max(np.flatnonzero(change == -1) - np.flatnonzero(change == 1))) <= max_gap_rows


def _runs(mask):
    change = np.diff(np.r_[0, mask.astype(int), 0])
    return list(zip(np.flatnonzero(change == 1), np.flatnonzero(change == -1)))


def choose_rows(valid, candidate, *, max_gap_rows: int = 8, max_invalid_fraction: float = 0.05,
                min_rows: int = 32) -> tuple[int, int]:
    """The block of rows to analyse: all of them, or the longest stretch clear of a defect.

    A band across the image (an information bar that does not reach the border, a scratch,
    missing or corrupted rows, a stitched frame) fails many edges on the same rows; left in,
    it excludes every edge.  Candidate blocks are all rows, and the longest runs of rows where
    at least half, or all, of the ``candidate`` edges are valid (or in a gap short enough to
    bridge); each scores the rows times
    the edges usable in it (gaps bridgeable as in :func:`bridge_gaps`), and the best block of
    at least ``min_rows`` rows is kept (all rows on a tie).  Returns ``(start, stop)``.

    Examples
    --------
    >>> import numpy as np
    >>> valid = np.ones((4, 200), bool); valid[:, 150:170] = False    # a band across the image
    >>> choose_rows(valid, np.ones(4, bool))
    (0, 150)
    """
    valid = np.asarray(valid, bool)
    n_r = valid.shape[1]
    cand = np.flatnonzero(candidate)
    if cand.size == 0:
        return 0, n_r
    v = valid[cand]
    covered = v.copy()              # valid, or inside a gap short enough to bridge
    for row in covered:
        for a, b in _runs(~row):
            if b - a <= max_gap_rows and a > 0 and b < n_r:
                row[a:b] = True
    blocks = [(0, n_r)]
    for share in (0.5, 1.0):
        runs = _runs(covered.mean(axis=0) >= share - 1e-12)
        if runs:
            blocks.append(max(runs, key=lambda ab: ab[1] - ab[0]))
    best, best_score = (0, n_r), -1
    for a, b in blocks:
        if b - a < min(min_rows, n_r):
            continue
        score = (b - a) * sum(_bridgeable(row[a:b], max_gap_rows, max_invalid_fraction) for row in v)
        if score > best_score:
            best, best_score = (int(a), int(b)), score
    return best


def bridge_gaps(position_nm, sigma_nm, valid, *, max_gap_rows: int = 8,
                max_invalid_fraction: float = 0.05) -> PreparedTraces:
    """Bridge runs of at most ``max_gap_rows`` invalid rows by linear interpolation.

    An edge with more than ``max_invalid_fraction`` invalid rows, or a longer gap, is excluded
    with its reason (never silently): interpolation smooths the roughness and the noise there.
    Gaps at either end are filled with the nearest valid row.

    Examples
    --------
    >>> import numpy as np
    >>> x = np.array([[0.0, 1.0, np.nan, 3.0, 4.0] * 4])
    >>> prep = bridge_gaps(x, np.ones_like(x), np.isfinite(x), max_invalid_fraction=0.3)
    >>> float(prep.position_nm[0, 2]), int(prep.bridged_rows[0])
    (2.0, 4)
    """
    pos = np.array(position_nm, float)
    sig = np.array(sigma_nm, float)
    valid = np.asarray(valid, bool)
    n_e, n_r = pos.shape
    usable = np.ones(n_e, bool)
    why = np.array([""] * n_e, dtype=object)
    bridged = np.zeros(n_e, np.int64)
    rows = np.arange(n_r)
    for e in range(n_e):
        ok = valid[e] & np.isfinite(pos[e]) & np.isfinite(sig[e])
        bad = ~ok
        if bad.mean() > max_invalid_fraction:
            usable[e], why[e] = False, "too_many_invalid_rows"
            continue
        if not bad.any():
            continue
        # run lengths of invalid rows
        edges_ = np.diff(np.r_[0, bad.astype(int), 0])
        starts, stops = np.flatnonzero(edges_ == 1), np.flatnonzero(edges_ == -1)
        if np.max(stops - starts) > max_gap_rows:
            usable[e], why[e] = False, "gap_too_long"
            continue
        good_rows = rows[ok]
        pos[e, bad] = np.interp(rows[bad], good_rows, pos[e, ok])
        # interpolation weights for the noise: t between the neighbouring valid rows
        right = np.clip(np.searchsorted(good_rows, rows[bad]), 1, good_rows.size - 1)
        ra, rb = good_rows[right - 1], good_rows[right]
        t = np.clip((rows[bad] - ra) / np.maximum(rb - ra, 1), 0, 1)
        t = np.where(rows[bad] < good_rows[0], 0.0, np.where(rows[bad] > good_rows[-1], 1.0, t))
        sa, sb = sig[e, ra], sig[e, rb]
        sig[e, bad] = np.sqrt((1 - t) ** 2 * sa ** 2 + t ** 2 * sb ** 2)
        bridged[e] = int(bad.sum())
    return PreparedTraces(position_nm=pos, sigma_nm=sig, usable=usable, exclusion=why.astype(str),
                          bridged_rows=bridged)
