"""The comparison in plain sentences, for the console and the report (projections of a
:class:`roughness.differences.Comparison`; nothing is computed here but wording)."""
from __future__ import annotations

import math

import numpy as np

__all__ = ["comparison_sentences", "noise_sentences", "power_sentences"]

_LABEL = {"edge": "LER", "width": "LWR", "centre": "line-placement roughness"}


def _p(p):
    return "p < 0.001" if p < 0.001 else f"p = {p:.2g}" if p < 0.1 else f"p = {p:.2f}"


def _noisier(comparison, a, b, q):
    na = comparison.estimate(a).noise_fraction.get(q, math.nan)
    nb = comparison.estimate(b).noise_fraction.get(q, math.nan)
    if not (np.isfinite(na) and np.isfinite(nb)):
        return None, na, nb
    return (b if nb > na else a), na, nb


def comparison_sentences(comparison, quantities=("edge", "width")) -> list:
    """One plain sentence per pair of groups and quantity (differences are b - a, in 3-sigma)."""
    out = []
    many = len(comparison.estimates) > 2
    level = f"{100 * comparison.confidence:.0f}%"
    for q in quantities:
        label = _LABEL[q]
        for d in [x for x in comparison.differences if x.quantity == f"{q}_sigma_unbiased_nm"]:
            a, b = d.group_a, d.group_b
            raw = comparison.difference(a, b, f"{q}_sigma_biased_nm")
            p = d.p_value_adjusted
            p_text = _p(p) + (", Holm-adjusted" if many else "") if np.isfinite(p) else ""
            if not d.determined:
                below = [g for g, v in ((a, d.value_a_nm), (b, d.value_b_nm)) if not np.isfinite(v)]
                why = (f"the unbiased {label} of {' and '.join(below)} is below the noise" if below
                       else "too few images or lines for an interval")
                out.append(f"{label}, {b} against {a}: not determined ({why}).")
                continue
            lo, hi = 3 * d.difference_low_nm, 3 * d.difference_high_nm
            if d.significant:
                text = (f"{b} is {'rougher' if d.difference_nm > 0 else 'smoother'} than {a} by "
                        f"{3 * abs(d.difference_nm):.2f} nm 3-sigma {label} ({level} CI {lo:.2f} to {hi:.2f}, {p_text})")
            else:
                text = (f"No significant difference in 3-sigma {label} between {a} and {b}: {b} - {a} = "
                        f"{3 * d.difference_nm:+.2f} nm ({level} CI {lo:.2f} to {hi:.2f}, {p_text})")
            noisier, na, nb = _noisier(comparison, a, b, q)
            shares = f"noise {100 * na:.0f}% of {a}'s variance, {100 * nb:.0f}% of {b}'s"
            if raw.determined and raw.significant and not d.significant:
                text += (f"; the raw numbers would call {b} {'rougher' if raw.difference_nm > 0 else 'smoother'} by "
                         f"{3 * abs(raw.difference_nm):.2f} nm only because {noisier}'s images are noisier ({shares})")
            elif raw.determined and raw.significant and d.significant:
                if np.sign(raw.difference_nm) != np.sign(d.difference_nm):
                    text += f"; the raw numbers point the other way because {noisier}'s images are noisier ({shares})"
                else:
                    ratio = raw.difference_nm / d.difference_nm
                    if ratio > 1.1:
                        text += (f"; the raw numbers overstate the gap by {100 * (ratio - 1):.0f}% because "
                                 f"{noisier}'s images are noisier ({shares})")
                    elif ratio < 0.9:
                        text += (f"; the raw numbers understate it by {100 * (1 - ratio):.0f}% because "
                                 f"{noisier}'s images are noisier ({shares})")
            elif raw.determined and d.significant and not raw.significant:
                text += f"; the raw numbers miss it: the noise of {noisier}'s images hides it ({shares})"
            out.append(text + ".")
    return out


def noise_sentences(comparison) -> list:
    """Per group: how much noise inflates the raw 3-sigma LER and LWR, and the frames that fix it."""
    out = []
    for c in comparison.noise:
        label = _LABEL[c.quantity]
        if not np.isfinite(c.noise_fraction):
            out.append(f"{c.group}: {label} noise share not determined.")
            continue
        if not np.isfinite(c.inflation_3sigma):
            out.append(f"{c.group}: the {label} is at or below the noise: the raw 3-sigma is all noise; more frames or "
                       "dose are needed before it can be measured.")
            continue
        text = (f"{c.group}: noise is {100 * c.noise_fraction:.0f}% of the {label} variance and inflates the raw "
                f"3-sigma by {100 * c.inflation_3sigma:.1f}%")
        if c.flagged:
            frames = c.frames_needed
            fix = (f"about {math.ceil(frames)} frames (now {c.frames_now:.0f}) or that many times the dose"
                   if np.isfinite(frames) else "more frames or dose")
            text += (f", above the {100 * c.target_fraction:.0f}% target: {fix} would bring it there "
                     "(more dose can shrink or damage resist; check against the site's procedures)")
        else:
            text += f", within the {100 * c.target_fraction:.0f}% target"
        out.append(text + ".")
    return out


def power_sentences(comparison, quantities=("edge", "width")) -> list:
    """Per pair: units per group to detect the planned difference with the stated power."""
    out = []
    eff = comparison.effect_3sigma_nm
    if not np.isfinite(eff):
        return out
    for d, n in zip(comparison.differences, comparison.units_needed):
        q = d.quantity.split("_")[0]
        if q not in quantities or "unbiased" not in d.quantity:
            continue
        ea, eb = comparison.estimate(d.group_a), comparison.estimate(d.group_b)
        unit = ea.unit if ea.unit == eb.unit else "images"
        if not np.isfinite(n):
            out.append(f"{_LABEL[q]}, {d.group_a} and {d.group_b}: sample size for a {eff:.2f} nm 3-sigma difference not "
                       "determined (the spread between units is unknown with one unit per group).")
            continue
        out.append(f"To detect a {eff:.2f} nm difference in unbiased 3-sigma {_LABEL[q]} between {d.group_a} and "
                   f"{d.group_b} with {100 * comparison.power:.0f}% power: about {n:.0f} {unit} per group "
                   f"(now {ea.n_units} and {eb.n_units}).")
    return out
