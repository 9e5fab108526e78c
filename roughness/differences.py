"""Differences between groups of images: intervals, significance and power at the level that is
really independent (images; lines for a group of one image).

Each group's sigma is resampled by the bootstrap of :func:`roughness.stats.bootstrap_lines`;
a difference takes the two groups' bootstrap standard errors, a Welch-Satterthwaite number of
degrees of freedom and a Student t reference (Welch 1947, *Biometrika* 34, "The generalization of
Student's problem when several different population variances are involved"), so that its
interval and its test agree: the interval excludes zero exactly when ``p < 1 - confidence``.
Several pairs are adjusted by Holm's step-down method (Holm 1979, *Scand. J. Statist.* 6, "A
simple sequentially rejective multiple test procedure").
"""
from __future__ import annotations

import math
from dataclasses import dataclass

import numpy as np
from scipy.stats import norm, t as student_t

from .stats import QUANTITIES, bootstrap_lines

__all__ = ["COMPARED_QUANTITIES", "GroupEstimate", "Difference", "estimate_group", "difference",
           "pairwise_differences", "holm", "units_needed", "NoiseCheck", "noise_check", "Comparison",
           "compare_groups"]

#: The quantities compared, named as the summary table's columns (1-sigma, nm).
COMPARED_QUANTITIES = tuple(f"{q}_sigma_{kind}_nm" for q in QUANTITIES for kind in ("unbiased", "biased"))


def _split(quantity):
    if quantity not in COMPARED_QUANTITIES:
        raise ValueError(f"quantity={quantity!r}: must be one of {COMPARED_QUANTITIES}")
    q, _, kind, _ = quantity.split("_")
    return q, kind


@dataclass(frozen=True)
class GroupEstimate:
    """One group's sigmas with their bootstrap standard errors.

    Attributes
    ----------
    name : str
    value_nm, se_nm : dict
        Point estimate and standard error of every quantity of :data:`COMPARED_QUANTITIES`
        (NaN where the unbiased variance is not positive: not determined).
    noise_fraction : dict
        Noise share of the biased variance per quantity (``"edge"``, ``"width"``, ``"centre"``).
    n_units : int
        Independent units behind the standard errors.
    unit : {"images", "lines"}
        What they are: images, or the lines of a group of one image.
    n_images, n_lines : int
    """

    name: str
    value_nm: dict
    se_nm: dict
    noise_fraction: dict
    n_units: int
    unit: str
    n_images: int
    n_lines: int

    @property
    def df(self) -> int:
        return max(self.n_units - 1, 1)

    def unit_sd_nm(self, quantity: str) -> float:
        """Standard deviation of the quantity between single units (``se * sqrt(n)``)."""
        return self.se_nm[quantity] * math.sqrt(self.n_units)


def _sigma(var):
    var = np.asarray(var, float)
    with np.errstate(invalid="ignore"):
        return np.sqrt(np.clip(var, 0.0, None))


def estimate_group(lines, *, name: str = "", n_resamples: int = 1000,
                   rng: np.random.Generator | None = None) -> GroupEstimate:
    """Point values and bootstrap standard errors of a group's sigmas.

    Parameters
    ----------
    lines : sequence of LineVariances
        One per image of the group.
    name : str
    n_resamples : int
        Bootstrap resamples (at least 20).
    rng : numpy.random.Generator, optional

    Returns
    -------
    GroupEstimate

    Notes
    -----
    The standard error is the bootstrap's, times ``sqrt(n / (n - 1))`` for its divide-by-n
    variance (Efron & Tibshirani 1993, *An Introduction to the Bootstrap*, ch. 6), n the units
    at the top level.  A resample whose unbiased variance falls below zero counts as sigma 0.
    """
    if n_resamples < 20:
        raise ValueError(f"n_resamples={n_resamples}: at least 20 are needed for a standard error")
    lines = list(lines)
    point, boot, n_units = bootstrap_lines(lines, n_resamples=n_resamples, rng=rng)
    value, se, share = {}, {}, {}
    correction = math.sqrt(n_units / max(n_units - 1, 1))
    for q in QUANTITIES:
        b, n = float(point[q + "_b"]), float(point[q + "_n"])
        share[q] = n / b if b > 0 else math.nan
        for kind, p, reps in (("biased", b, boot[q + "_b"]),
                              ("unbiased", b - n, boot[q + "_b"] - boot[q + "_n"])):
            key = f"{q}_sigma_{kind}_nm"
            reps = _sigma(reps)
            reps = reps[np.isfinite(reps)]
            value[key] = math.sqrt(p) if p > 0 else math.nan
            se[key] = float(np.std(reps, ddof=1)) * correction if reps.size >= 10 and n_units > 1 else math.nan
    return GroupEstimate(name=name, value_nm=value, se_nm=se, noise_fraction=share, n_units=n_units,
                         unit="images" if len(lines) > 1 else "lines", n_images=len(lines),
                         n_lines=sum(lv.n_lines for lv in lines))


@dataclass(frozen=True)
class Difference:
    """``group_b - group_a`` of one quantity (nm, 1-sigma), with its interval and test.

    Attributes
    ----------
    group_a, group_b, quantity : str
    value_a_nm, value_b_nm : float
    difference_nm, difference_low_nm, difference_high_nm : float
        The difference and its confidence interval.
    ratio, ratio_low, ratio_high : float
        ``b / a`` and its interval (from the log ratio).
    se_nm, df : float
        Standard error of the difference and its Welch-Satterthwaite degrees of freedom.
    p_value : float
        Two-sided, Welch t on the bootstrap standard errors.
    p_value_adjusted : float
        Holm-adjusted over the pairs of the same quantity (equal to ``p_value`` for two groups).
    significant : bool
        ``p_value_adjusted < 1 - confidence``.
    confidence : float
    """

    group_a: str
    group_b: str
    quantity: str
    value_a_nm: float
    value_b_nm: float
    difference_nm: float
    difference_low_nm: float
    difference_high_nm: float
    ratio: float
    ratio_low: float
    ratio_high: float
    se_nm: float
    df: float
    p_value: float
    p_value_adjusted: float
    significant: bool
    confidence: float

    @property
    def determined(self) -> bool:
        return bool(np.isfinite(self.difference_nm) and np.isfinite(self.p_value))


def difference(a: GroupEstimate, b: GroupEstimate, quantity: str, *, confidence: float = 0.95) -> Difference:
    """``b - a`` of ``quantity`` with a Welch interval and test (not adjusted).

    Examples
    --------
    >>> a = GroupEstimate("A", {"edge_sigma_unbiased_nm": 1.0}, {"edge_sigma_unbiased_nm": 0.05}, {}, 6,
    ...                   "images", 6, 30)
    >>> b = GroupEstimate("B", {"edge_sigma_unbiased_nm": 1.2}, {"edge_sigma_unbiased_nm": 0.05}, {}, 6,
    ...                   "images", 6, 30)
    >>> d = difference(a, b, "edge_sigma_unbiased_nm")
    >>> round(d.difference_nm, 2), round(d.df, 1), d.p_value < 0.05
    (0.2, 10.0, True)
    """
    _split(quantity)
    if not 0 < confidence < 1:
        raise ValueError(f"confidence={confidence}: must be between 0 and 1")
    va, vb = a.value_nm[quantity], b.value_nm[quantity]
    sa, sb = a.se_nm[quantity], b.se_nm[quantity]
    d = vb - va
    se = math.hypot(sa, sb)
    nan = math.nan
    lo = hi = p = df = r = r_lo = r_hi = nan
    if np.isfinite(d) and np.isfinite(se) and se > 0:
        # Welch-Satterthwaite degrees of freedom of a difference of two independent estimates
        df = se ** 4 / (sa ** 4 / a.df + sb ** 4 / b.df)
        tq = float(student_t.ppf(0.5 * (1 + confidence), df))
        lo, hi = d - tq * se, d + tq * se
        p = float(2 * student_t.sf(abs(d) / se, df))
        if va > 0 and vb > 0:
            r = vb / va
            se_log = math.hypot(sa / va, sb / vb)
            r_lo, r_hi = r * math.exp(-tq * se_log), r * math.exp(tq * se_log)
    elif np.isfinite(d) and se == 0:
        lo = hi = d
        p = 1.0 if d == 0 else 0.0
    return Difference(group_a=a.name, group_b=b.name, quantity=quantity, value_a_nm=va, value_b_nm=vb,
                      difference_nm=d, difference_low_nm=lo, difference_high_nm=hi, ratio=r, ratio_low=r_lo,
                      ratio_high=r_hi, se_nm=se, df=df, p_value=p, p_value_adjusted=p,
                      significant=bool(np.isfinite(p) and p < 1 - confidence), confidence=confidence)


def holm(p_values) -> np.ndarray:
    """Holm's step-down adjusted p-values (NaN stays NaN and does not count as a test).

    Examples
    --------
    >>> holm([0.01, 0.04, 0.03]).round(3).tolist()
    [0.03, 0.06, 0.06]
    """
    p = np.asarray(p_values, float)
    out = np.full(p.shape, np.nan)
    ok = np.flatnonzero(np.isfinite(p))
    m = ok.size
    if m == 0:
        return out
    order = ok[np.argsort(p[ok], kind="stable")]
    adjusted = np.maximum.accumulate((m - np.arange(m)) * p[order])
    out[order] = np.minimum(adjusted, 1.0)
    return out


def pairwise_differences(estimates, *, quantities=COMPARED_QUANTITIES, confidence: float = 0.95) -> tuple:
    """Every pair (in the order given: ``b`` after ``a``) and quantity, Holm-adjusted per quantity."""
    estimates = list(estimates)
    out = []
    for q in quantities:
        diffs = [difference(a, b, q, confidence=confidence)
                 for i, a in enumerate(estimates) for b in estimates[i + 1:]]
        adjusted = holm([d.p_value for d in diffs])
        for d, pa in zip(diffs, adjusted):
            out.append(_replace_p(d, pa))
    return tuple(out)


def _replace_p(d: Difference, pa: float) -> Difference:
    from dataclasses import replace

    return replace(d, p_value_adjusted=float(pa), significant=bool(np.isfinite(pa) and pa < 1 - d.confidence))


def units_needed(a: GroupEstimate, b: GroupEstimate, quantity: str, *, effect_nm: float, power: float = 0.8,
                 confidence: float = 0.95) -> float:
    """Units (images, or lines for groups of one image) per group to detect ``effect_nm`` (1-sigma)
    with the given power, at the between-unit variability observed.

    Two-sample t with equal group sizes, iterated on its degrees of freedom (Cohen 1988,
    *Statistical Power Analysis for the Behavioral Sciences*, ch. 2).  NaN when the variability is
    not determined; at least 2.

    Examples
    --------
    >>> e = GroupEstimate("A", {"edge_sigma_unbiased_nm": 1.0}, {"edge_sigma_unbiased_nm": 0.1}, {}, 4,
    ...                   "images", 4, 20)
    >>> units_needed(e, e, "edge_sigma_unbiased_nm", effect_nm=0.2)   # unit sd 0.2 nm each
    17.0
    """
    _split(quantity)
    if not effect_nm > 0:
        raise ValueError(f"effect_nm={effect_nm}: must be positive")
    if not 0 < power < 1:
        raise ValueError(f"power={power}: must be between 0 and 1")
    var = a.unit_sd_nm(quantity) ** 2 + b.unit_sd_nm(quantity) ** 2
    if not np.isfinite(var):
        return math.nan
    alpha = 1 - confidence
    n = ((norm.ppf(1 - alpha / 2) + norm.ppf(power)) ** 2) * var / effect_nm ** 2
    for _ in range(20):
        df = max(2 * n - 2, 1.0)
        n_new = ((student_t.ppf(1 - alpha / 2, df) + student_t.ppf(power, df)) ** 2) * var / effect_nm ** 2
        if abs(n_new - n) < 1e-6:
            break
        n = n_new
    return float(max(2, math.ceil(n - 1e-9)))


# ------------------------------------------------------------------------------------------
@dataclass(frozen=True)
class NoiseCheck:
    """How much image noise inflates one group's roughness, and what would fix it.

    Attributes
    ----------
    group, quantity : str
        ``quantity`` is ``"edge"`` (LER) or ``"width"`` (LWR).
    noise_fraction : float
        Noise share of the biased variance.
    inflation_3sigma : float
        By how much the noise inflates the biased 3-sigma over the unbiased one:
        ``1 / sqrt(1 - noise_fraction) - 1`` (0.21 share -> 12.5%); NaN when the noise is all.
    flagged : bool
        ``noise_fraction`` above the target share.
    target_fraction : float
    frames_now, frames_needed : float
        Frames averaged now and frames that bring the share to the target (noise variance
        falling as 1 / frames); infinite when the roughness is below the noise.
    """

    group: str
    quantity: str
    noise_fraction: float
    inflation_3sigma: float
    flagged: bool
    target_fraction: float
    frames_now: float
    frames_needed: float


def noise_check(group: str, quantity: str, var_biased_nm2: float, var_noise_nm2: float, *,
                target_fraction: float, frames_now: int = 1) -> NoiseCheck:
    """The noise check of one group and quantity.

    Examples
    --------
    >>> c = noise_check("A", "edge", 1.0, 0.21, target_fraction=0.1)
    >>> round(c.inflation_3sigma, 3), c.flagged, round(c.frames_needed, 2)
    (0.125, True, 2.39)
    """
    from .stats import frames_for_noise_fraction

    share = var_noise_nm2 / var_biased_nm2 if var_biased_nm2 > 0 else math.nan
    inflation = 1 / math.sqrt(1 - share) - 1 if np.isfinite(share) and share < 1 else math.nan
    frames = math.nan
    if np.isfinite(share):
        frames = frames_for_noise_fraction(noise_var_nm2=var_noise_nm2, unbiased_var_nm2=var_biased_nm2 - var_noise_nm2,
                                           target_fraction=target_fraction, frames_now=frames_now)
    return NoiseCheck(group=group, quantity=quantity, noise_fraction=share, inflation_3sigma=inflation,
                      flagged=bool(np.isfinite(share) and share > target_fraction), target_fraction=target_fraction,
                      frames_now=float(frames_now), frames_needed=frames)


@dataclass(frozen=True)
class Comparison:
    """Groups side by side (see :func:`compare_groups`).

    Attributes
    ----------
    estimates : tuple of GroupEstimate
        In the order given.
    differences : tuple of Difference
        Every pair (``b`` after ``a`` in that order) and every quantity of :data:`COMPARED_QUANTITIES`.
    units_needed : tuple of float
        Beside ``differences``: units per group to detect ``effect_3sigma_nm`` with 80% power.
    noise : tuple of NoiseCheck
        LER and LWR of every group.
    band_per_nm : (float, float)
        The frequency band every group's PSD covers (coarsest resolution to lowest Nyquist).
    band_sigma_unbiased_nm : tuple of float
        Each group's unbiased edge sigma integrated over that band (a common footing when line
        lengths or pixel sizes differ).
    notes : tuple of (code, text)
        Where the groups are not on the same footing, or share images.
    effect_3sigma_nm : float
        The difference the power numbers aim at (3-sigma nm).
    power, confidence : float
    """

    estimates: tuple
    differences: tuple
    units_needed: tuple
    noise: tuple
    band_per_nm: tuple
    band_sigma_unbiased_nm: tuple
    notes: tuple
    effect_3sigma_nm: float
    power: float
    confidence: float

    def difference(self, group_a: str, group_b: str, quantity: str) -> Difference:
        for d in self.differences:
            if (d.group_a, d.group_b, d.quantity) == (group_a, group_b, quantity):
                return d
        raise KeyError(f"no difference {group_b} - {group_a} of {quantity}")

    def estimate(self, name: str) -> GroupEstimate:
        for e in self.estimates:
            if e.name == name:
                return e
        raise KeyError(f"no group {name!r}")


def _band_sigma(spectrum, band):
    if spectrum is None:
        return math.nan
    f = spectrum.frequency_per_nm
    use = (f >= band[0] * (1 - 1e-9)) & (f <= band[1] * (1 + 1e-9)) & (f > 0)
    if not use.any():
        return math.nan
    df = float(f[1] - f[0])
    var = float(np.sum(spectrum.psd_unbiased_nm3[use]) * df)
    return math.sqrt(var) if var > 0 else math.nan


def _differs(values, rel=0.01):
    values = [v for v in values if np.isfinite(v)]
    return bool(values) and max(values) > min(values) * (1 + rel)


def compare_groups(members: dict, options=None, *, analyses: dict | None = None,
                   effect_3sigma_nm: float | None = None, power: float = 0.8) -> Comparison:
    """Compare groups of analysed images.

    Parameters
    ----------
    members : dict
        ``{group name: [ImageAnalysis, ...]}`` in the order to report (at least two groups,
        none empty).
    options : AnalysisOptions, optional
        Resamples, confidence, seed, noise-share target and frames.
    analyses : dict, optional
        ``{group name: GroupAnalysis}`` already reduced (computed otherwise).
    effect_3sigma_nm : float, optional
        The difference of unbiased 3-sigma to plan for; default 10% of the groups' mean
        unbiased 3-sigma LER.
    power : float

    Returns
    -------
    Comparison
    """
    from .analysis import AnalysisOptions, analyse_group

    options = options or AnalysisOptions()
    if len(members) < 2:
        raise ValueError(f"a comparison needs at least two groups, got {len(members)}")
    for name, images in members.items():
        if not images:
            raise ValueError(f"group {name!r} has no measured image")
    analyses = dict(analyses or {})
    for name, images in members.items():
        if name not in analyses:
            analyses[name] = analyse_group(images, options, name=name)
    rng = np.random.default_rng(options.seed)
    estimates = tuple(estimate_group([im.lines for im in images], name=name,
                                     n_resamples=max(options.n_resamples, 20), rng=rng)
                      for name, images in members.items())
    diffs = pairwise_differences(estimates, confidence=options.confidence)
    if effect_3sigma_nm is None:
        mean3 = np.nanmean([3 * e.value_nm["edge_sigma_unbiased_nm"] for e in estimates])
        effect_3sigma_nm = 0.1 * float(mean3) if np.isfinite(mean3) and mean3 > 0 else math.nan
    if np.isfinite(effect_3sigma_nm) and not effect_3sigma_nm > 0:
        raise ValueError(f"effect_3sigma_nm={effect_3sigma_nm}: must be positive")
    by_name = {e.name: e for e in estimates}
    needed = tuple(units_needed(by_name[d.group_a], by_name[d.group_b], d.quantity, effect_nm=effect_3sigma_nm / 3,
                                power=power, confidence=options.confidence)
                   if np.isfinite(effect_3sigma_nm) else math.nan for d in diffs)
    noise = []
    for name in members:
        s = analyses[name].summary
        for q in ("edge", "width"):
            v = s.quantity(q)
            noise.append(noise_check(name, q, v.var_biased_nm2, v.var_noise_nm2,
                                     target_fraction=options.noise_share_target, frames_now=options.frames))
    spectra = [analyses[n].edge_psd for n in members if analyses[n].edge_psd is not None]
    band = (math.nan, math.nan)
    if spectra:
        band = (max(float(s.frequency_per_nm[1]) for s in spectra), min(float(s.frequency_per_nm[-1]) for s in spectra))
    band_sigma = tuple(_band_sigma(analyses[n].edge_psd, band) for n in members)
    notes = _footing_notes(members, band)
    return Comparison(estimates=estimates, differences=diffs, units_needed=needed, noise=tuple(noise),
                      band_per_nm=band, band_sigma_unbiased_nm=band_sigma, notes=notes,
                      effect_3sigma_nm=float(effect_3sigma_nm), power=power, confidence=options.confidence)


def _footing_notes(members, band) -> tuple:
    notes = []
    spacing = {n: sorted({round(im.row_spacing_nm, 6) for im in ims}) for n, ims in members.items()}
    lengths = {n: float(np.median([im.line_length_nm for im in ims])) for n, ims in members.items()}
    if _differs([v for vals in spacing.values() for v in vals]):
        text = ", ".join(f"{n} {'/'.join(f'{v:g}' for v in vals)} nm" for n, vals in spacing.items())
        notes.append(("pixel_size_differs", f"the groups were imaged at different pixel sizes ({text}); the noise "
                      "floor and the finite-length bias differ with it: compare the unbiased values, and the "
                      f"band-limited sigma over {band[0]:.4g}-{band[1]:.4g} cycles/nm"))
    if _differs(list(lengths.values()), rel=0.05):
        text = ", ".join(f"{n} {v:.0f} nm" for n, v in lengths.items())
        notes.append(("line_length_differs", f"the measured line lengths differ ({text}); a shorter line shows "
                      "less of the long-wavelength roughness after detrending, so its sigma is lower for the "
                      f"same edges: the band-limited sigma over {band[0]:.4g}-{band[1]:.4g} cycles/nm compares "
                      "them on a common footing"))
    for attr, label in (("detector", "edge detectors"), ("profile_model", "profile models")):
        used = {n: sorted({getattr(im, attr) for im in ims}) for n, ims in members.items()}
        if len({tuple(v) for v in used.values()}) > 1:
            text = ", ".join(f"{n} {'/'.join(v)}" for n, v in used.items())
            notes.append((f"{attr}_differs", f"the groups were measured with different {label} ({text}); "
                          "a difference may come from the method, not the process"))
    seen = {}
    for n, ims in members.items():
        for im in ims:
            seen.setdefault(im.source, []).append(n)
    shared = {s: g for s, g in seen.items() if len(set(g)) > 1}
    if shared:
        first = next(iter(shared))
        notes.append(("shared_images", f"{len(shared)} image(s) belong to more than one group (e.g. {first} in "
                      f"{' and '.join(dict.fromkeys(shared[first]))}): those groups are not independent and the "
                      "tests between them are not valid"))
    return tuple(notes)
