"""Self-contained HTML report: figures embedded as PNG data, no external references.

Per image (the first ``max_image_sections``): the image with the fitted edges over it, the edge
traces, and the PSD on log-log axes (biased, noise floor, unbiased, model); for the set: the
pooled PSD, a table of biased / noise / unbiased 3-sigma LER and LWR with confidence intervals,
correlation length, roughness exponent and noise fraction, groups side by side, and warnings in
plain words.  Every text taken from the data (file names above all) is HTML-escaped.
"""
from __future__ import annotations

import base64
import html
import io
import math
from pathlib import Path

import numpy as np
from matplotlib.figure import Figure

from ..psd_model import PARAMETER_NAMES
from .sentences import comparison_sentences, noise_sentences, power_sentences

__all__ = ["write_report", "plot_psd", "plot_overlay", "plot_traces", "plot_precision", "plot_forest",
           "plot_group_psds"]

#: One colour per group in the comparison figures (apart from the meanings of ``_C``; biased
#: dashed and unbiased solid tell the two apart within a group).
_GROUP_COLOURS = ("#0b6e4f", "#b5176b", "#6b4f1d", "#4457d1", "#8a9a06", "#555555")

#: One colour per meaning, the same in every figure and table of the report: measured (biased)
#: values, the noise floor and anything the fit covariance says about noise, noise-free
#: (unbiased) values, theory (the PSD model, the Cramer-Rao bound), left and right edges, and
#: the virtual twin's achieved precision.  Chosen to stay apart in lightness and hue for the
#: common colour-vision deficiencies (checked by eye in a deuteranopia simulation).
_C = {"biased": "#d4700a", "floor": "#7a7a7a", "unbiased": "#1c4f9c", "model": "#111111",
      "left": "#d9a800", "right": "#17b3c2", "achieved": "#8e44ad"}


def _png(fig) -> str:
    buf = io.BytesIO()
    fig.savefig(buf, format="png", dpi=90, bbox_inches="tight")
    return "data:image/png;base64," + base64.b64encode(buf.getvalue()).decode("ascii")


def plot_psd(ax, frequency_per_nm, psd_biased_nm3, floor_nm3, model=None, *, title=""):
    """Biased PSD, noise floor, unbiased PSD (positive bins) and the model, log-log; returns ``ax``.

    Parameters
    ----------
    ax : matplotlib.axes.Axes
    frequency_per_nm : (n_freq,) ndarray
    psd_biased_nm3 : (n_freq,) ndarray
        One-sided PSD as measured.
    floor_nm3 : float or (n_freq,) ndarray
        Noise floor: white, or per frequency (noise correlated between rows).
    model : PSDModelFit, optional
    title : str
    """
    f = np.asarray(frequency_per_nm)[1:]
    pb = np.asarray(psd_biased_nm3)[1:]
    floor = np.broadcast_to(np.asarray(floor_nm3, float), np.asarray(frequency_per_nm).shape)[1:]
    pu = pb - floor
    ax.loglog(f, pb, color=_C["biased"], lw=1.2, label="biased (measured)")
    ax.loglog(f, floor, color=_C["floor"], ls="--", lw=1, label="noise floor (fit covariance)")
    pos = pu > 0
    ax.loglog(f[pos], pu[pos], ".", ms=2.5, color=_C["unbiased"], label="unbiased (floor removed)")
    if model is not None:
        xi = (f"xi {model.correlation_length_nm:.1f} nm" if np.isfinite(model.correlation_length_nm)
              and not model.reason("correlation_length") else "xi not determined")
        h = (f"H {model.roughness_exponent:.2f}" if model.h_determined and not model.reason("roughness_exponent")
             else "H not determined")
        band = (f >= model.fit_min_per_nm) & (f <= model.fit_max_per_nm)
        ax.loglog(f[band], model.model_nm3(f[band]), color=_C["model"], lw=1.5, label=f"model: {xi}, {h}")
    ax.set_xlabel("spatial frequency (1/nm)")
    ax.set_ylabel("PSD, one-sided (nm$^3$)")
    ax.set_title(title, fontsize=9)
    ax.legend(fontsize=7, frameon=False)
    ax.grid(True, which="both", alpha=0.2)
    return ax


def plot_precision(ax, edges):
    """Per edge: the real scatter of a row's position (precision study), the Cramer-Rao bound
    and the fit's rms uncertainty as reported; returns ``ax``."""
    k = np.arange(np.asarray(edges.line).size)
    ax.plot(k, edges.achieved_sd_nm, "o", ms=4, color=_C["achieved"], label="achieved (virtual twin)")
    ax.plot(k, edges.crlb_sd_nm, "_", ms=10, mew=2, color=_C["model"], label="Cramér–Rao bound")
    ax.plot(k, edges.fit_sigma_rms_nm, "x", ms=4, color=_C["floor"], label="reported uncertainty (rms)")
    ax.set_xlabel("edge (left to right)")
    ax.set_ylabel("position sd of one row (nm)")
    ax.set_ylim(bottom=0)
    ax.legend(fontsize=7, frameon=False)
    ax.grid(True, alpha=0.2)
    return ax


def _precision_text(a) -> str:
    d = a.edges
    if not np.any(np.isfinite(d.achieved_sd_nm)):
        return ""
    ach, bound = float(np.nanmedian(d.achieved_sd_nm)), float(np.nanmedian(d.crlb_sd_nm))
    eff = (bound / ach) ** 2 if ach > 0 else math.nan
    reach = ("attains the bound (within the study's sampling error of a few per cent)" if eff >= 0.97
             else f"draws {_pct(eff)} of the information the image holds")
    text = (f"Precision of this image (virtual twin): one row places an edge to {_fmt(ach, 3)} nm (1&sigma;, "
            f"median over edges); the Cram&eacute;r&ndash;Rao bound at this dose and contrast is {_fmt(bound, 3)} nm: "
            f"the fit {reach}. Shrinkage {_fmt(a.shrinkage, 3)} (1 = the fit follows the edge fully).")
    if a.precision_calibration != 1.0:
        text += (f" The fit's linearised uncertainties were scaled by {_fmt(a.precision_calibration, 2)} in variance "
                 "to match the real scatter.")
    return "<p class='note'>" + text + "</p>"


def plot_overlay(ax, pixels, traces, *, max_rows=512):
    """The image (rows along the lines) at its true aspect ratio with the fitted edges over it
    (left edges and right edges in their own colours) and a scale bar; returns ``ax``."""
    rows = min(pixels.shape[0], max_rows)
    p = traces.row_spacing_nm
    width = pixels.shape[1] * p
    ax.imshow(pixels[:rows], cmap="gray", aspect="equal", interpolation="nearest",
              extent=(-0.5 * p, (pixels.shape[1] - 0.5) * p, (rows - 0.5) * p, -0.5 * p))
    y = np.arange(rows) * p
    for e in range(traces.n_edges):
        ax.plot(traces.position_nm[e, :rows], y, color=_C["left" if traces.side[e] == "left" else "right"], lw=0.7)
    bar = _nice_length(width / 5)
    x0, y0 = 0.05 * width, 0.94 * rows * p
    ax.plot([x0, x0 + bar], [y0, y0], color="white", lw=3, solid_capstyle="butt")
    ax.text(x0 + bar / 2, y0 - 0.02 * rows * p, f"{bar:g} nm", color="white", ha="center", va="bottom", fontsize=8)
    ax.set_xlabel("across the lines (nm)")
    ax.set_ylabel("along the lines (nm)")
    ax.set_xlim(-0.5 * p, (pixels.shape[1] - 0.5) * p)
    ax.set_ylim((rows - 0.5) * p, -0.5 * p)
    return ax


def _nice_length(x):
    """1, 2 or 5 times a power of ten, at most ``x``."""
    e = 10 ** math.floor(math.log10(x))
    return max(m * e for m in (1, 2, 5) if m * e <= x)


def plot_traces(ax, traces, *, n_edges=6):
    """Edge deviations from their straight-line fit, offset for clarity; returns ``ax``."""
    y = np.arange(traces.n_rows) * traces.row_spacing_nm
    for k, e in enumerate(range(min(n_edges, traces.n_edges))):
        x = traces.position_nm[e]
        ok = np.isfinite(x)
        if ok.sum() < 3:
            continue
        dev = x - np.polyval(np.polyfit(y[ok], x[ok], 1), y)
        ax.plot(y, dev + 8 * k, lw=0.6, color=_C["left"] if traces.side[e] == "left" else _C["right"])
    ax.set_xlabel("along the line (nm)")
    ax.set_ylabel("edge deviation, offset by 8 nm each (nm)")
    return ax


def _fmt(x, nd=2):
    return "not determined" if x is None or not np.isfinite(x) else f"{x:.{nd}f}"


def _pct(x):
    return "not determined" if x is None or not np.isfinite(x) else f"{100 * x:.0f}%"


def _pm(x, se, nd=2, unit=""):
    """``x +- se unit``, or ``x unit (no standard error)`` when the error is unknown."""
    if se is None or not np.isfinite(se):
        return f"{_fmt(x, nd)}{unit} (no standard error)"
    return f"{_fmt(x, nd)} &plusmn; {_fmt(se, nd)}{unit}"


def _ci(v):
    lo, hi = v.sigma_unbiased_low_nm, v.sigma_unbiased_high_nm
    return f"{_fmt(3 * lo)} to {_fmt(3 * hi)}" if np.isfinite(lo) and np.isfinite(hi) else "not determined"


def _table(summary, model, finite_nm=math.nan):
    esc = html.escape
    rows = []
    for q, name in (("edge", "LER (edges)"), ("width", "LWR (widths)"), ("centre", "line placement (centres)")):
        v = summary.quantity(q)
        rows.append(f"<tr><td>{esc(name)}</td><td>{_fmt(3 * v.sigma_biased_nm)}</td>"
                    f"<td>{_fmt(3 * v.sigma_noise_nm)}</td><td><b>{_fmt(3 * v.sigma_unbiased_nm)}</b></td>"
                    f"<td>{_ci(v)}</td><td>{_pct(v.noise_fraction)}</td>"
                    f"<td>{esc(v.status)}</td></tr>")
    extra = []
    if model is not None:
        def value(name, text):
            why = model.reason(name)
            return text if not why else f"{PARAMETER_NAMES[name]} not determined ({esc(why)})"
        extra.append(value("correlation_length", "correlation length " + _pm(
            model.correlation_length_nm, model.correlation_length_se_nm, 1, " nm")))
        extra.append(value("roughness_exponent", "roughness exponent " + _pm(
            model.roughness_exponent, model.roughness_exponent_se)))
        if model.floor_mode == "free":
            extra.append("the PSD model's noise floor was fitted, not fixed to the fit covariance's "
                         "(contrast-to-noise below 5, where the covariance under-states the scatter)")
        extra.append(value("psd0", f"PSD(0) {_fmt(model.psd0_nm3, 1)} nm<sup>3</sup> one-sided "
                                   f"({_fmt(model.psd0_two_sided_nm3, 1)} nm<sup>3</sup> two-sided, as usually quoted)"))
        extra.append(value("sigma", f"sigma of an infinitely long edge (model) {_fmt(model.sigma_nm)} nm"))
        if np.isfinite(finite_nm) and model.sigma_nm > 0:
            extra.append(f"over the measured length, after detrending, the model expects {_fmt(finite_nm)} nm "
                         f"({_fmt(100 * (finite_nm / model.sigma_nm - 1), 1)}%: a finite, detrended line always "
                         "shows less roughness than an infinitely long one)")
    extra.append(f"CD {_fmt(summary.cd_nm)} nm; left/right edge correlation {_fmt(summary.lr_correlation_unbiased)} "
                 f"(noise-corrected; {_fmt(summary.lr_correlation_biased)} as measured)")
    extra.append(f"{summary.n_lines} lines, {summary.n_edges} edges, {summary.n_images} image(s)")
    return ("<table><tr><th></th><th>3&sigma; biased (nm)</th><th>3&sigma; noise (nm)</th>"
            f"<th>3&sigma; unbiased (nm)</th><th>{100 * summary.confidence:.0f}% interval, unbiased</th>"
            "<th>noise fraction (of variance)</th><th>status</th></tr>" + "".join(rows) + "</table>"
            "<p class='facts'>" + "<br>".join(extra) + "</p>")


_CSS = """
body{font-family:Helvetica,Arial,sans-serif;margin:24px 40px;color:#222;max-width:1100px}
h1{font-size:22px;border-bottom:3px solid #1c4f9c;padding-bottom:6px;margin-bottom:8px}
h2{font-size:17px;color:#1c4f9c;margin-top:30px}
table{border-collapse:collapse;margin:8px 0;font-size:13px}
td,th{border:1px solid #ccc;padding:4px 8px;text-align:right}
td:first-child,th:first-child{text-align:left}
th{background:#eef3f7}
.warn{background:#fff4e0;border-left:4px solid #e0a030;padding:6px 10px;margin:6px 0;font-size:13px}
.facts{font-size:13px;line-height:1.5}
.figs{display:flex;flex-wrap:wrap;gap:8px;align-items:flex-start}
.figs figure{margin:0;width:32%}
.figs img{max-width:100%}
figcaption{font-size:11px;color:#555}
.verdict{border:2px solid #1c4f9c;border-radius:6px;padding:4px 16px 8px;background:#f4f7fb}
.verdict h2{margin-top:8px}
.verdict td.big{font-size:18px;font-weight:bold;color:#1c4f9c}
.answer{font-size:15px}
footer{font-size:11px;color:#555;margin-top:30px;border-top:1px solid #ccc;padding-top:8px}
.note{font-size:12px;color:#555}
.figs2 img{max-width:49%;margin-right:1%;vertical-align:top}
.answers li{font-size:15px;margin:4px 0}
td.flag{background:#fde8dc}
h3{font-size:14px;color:#1c4f9c}
"""


def _figure(*, figsize, ncols=1):
    fig = Figure(figsize=figsize)
    axes = fig.subplots(1, ncols)
    return fig, axes


_STATUS_WORDS = {
    "ok": "measured",
    "warning": "measured, with warnings to read",
    "noise_dominated": "noise dominates: the unbiased value rests on a small difference and is not a confident number",
    "below_noise": "roughness at or below the noise: not measurable at this dose",
    "not_measured": "not measured",
}


def _action(meas, g) -> str:
    """The one action that would most improve the numbers of group ``g``."""
    s, v = meas.settings, g.summary.edge
    frames = g.advice.frames_for_noise_target
    if v.status in ("below_noise", "not_measured"):
        return "Raise the signal: average more frames or raise the dose until the edges stand above the noise."
    if np.isfinite(v.noise_fraction) and v.noise_fraction > s.noise_share_target:
        how = f"about {math.ceil(frames)} frames (now {s.frames})" if np.isfinite(frames) else "more frames"
        return (f"Cut the image noise: {how}, or that many times the dose, would bring the noise share of the "
                f"variance under {100 * s.noise_share_target:.0f}% (more dose can shrink or damage resist).")
    lo, hi = v.sigma_unbiased_low_nm, v.sigma_unbiased_high_nm
    rel = (hi - lo) / (2 * v.sigma_unbiased_nm) if np.isfinite(lo) and np.isfinite(hi) and v.sigma_unbiased_nm > 0 \
        else math.nan
    if np.isfinite(rel) and rel > 2 * s.precision_target:
        lines = g.advice.lines_for_precision_target
        more = f"about {lines:.0f} lines of this length" if np.isfinite(lines) else "more lines or images"
        return (f"Measure more: the interval is &plusmn;{100 * rel:.0f}% of the value; {more} would give "
                f"&plusmn;{100 * s.precision_target:.0f}% (1 sd).")
    warned = [r for r in meas.images if r.analysis.warnings and (not g.name or r.group == g.name)]
    if warned:
        return f"Read the warnings of {len(warned)} image(s) in the table below before relying on the numbers."
    return "None needed: the noise share is under the target and the interval is tight."


def _verdict(meas) -> str:
    """The first screen: unbiased LER/LWR with intervals, noise share and inflation, status, action."""
    esc = html.escape
    groups = meas.groups if meas.comparison is not None else ((meas.overall,) if meas.overall else ())
    if not groups:
        return ("<div class='verdict'><b>No image could be measured.</b> The reasons are listed below and in "
                "failures.csv.</div>")
    statuses = {}
    for r in meas.images:
        statuses.setdefault(r.analysis.status, []).append(r)
    rows = []
    for g in groups:
        v = g.summary
        label = f"<td>{esc(g.name)}</td>" if meas.comparison is not None else ""
        rows.append(f"<tr>{label}<td class='big'>{_fmt(3 * v.edge.sigma_unbiased_nm)} nm</td><td>{_ci(v.edge)}</td>"
                    f"<td class='big'>{_fmt(3 * v.width.sigma_unbiased_nm)} nm</td><td>{_ci(v.width)}</td>"
                    f"<td>{_pct(v.edge.noise_fraction)} of the variance: raw 3&sigma; {_plus(v.edge.inflation_3sigma)}"
                    f"</td><td>{esc(_STATUS_WORDS.get(v.edge.status, v.edge.status))}</td></tr>")
    head = "<th>group</th>" if meas.comparison is not None else ""
    level = f"{100 * meas.settings.confidence:.0f}%"
    counts = ", ".join(f"{len(v)} {esc(k.replace('_', ' '))}" for k, v in sorted(statuses.items()))
    actions = "".join(f"<li>{esc(g.name) + ': ' if meas.comparison is not None else ''}{_action(meas, g)}</li>"
                      for g in groups)
    first = ""
    if meas.comparison is not None:
        from .sentences import comparison_sentences

        first = "<p class='answer'>" + esc(comparison_sentences(meas.comparison, quantities=("edge",))[0]) + "</p>"
    return ("<div class='verdict' id='verdict'><h2>Verdict</h2>" + first +
            f"<table><tr>{head}<th>LER 3&sigma; unbiased</th><th>{level} interval</th><th>LWR 3&sigma; unbiased</th>"
            f"<th>{level} interval</th><th>noise and what it does to 3&sigma;</th><th>status</th></tr>"
            + "".join(rows) + "</table>"
            f"<p>Images: {len(meas.images)} measured ({counts}), {len(meas.failures)} failed.</p>"
            f"<p><b>What would most improve the numbers:</b></p><ul>{actions}</ul></div>")


def _plus(x):
    return "inflated by not determined" if not np.isfinite(x) else f"inflated by {100 * x:.1f}%"


def _images_table(meas) -> str:
    """Every measured image in one sortable table (click a heading)."""
    esc = html.escape
    head = ["image", "group", "pixel (nm)", "lines", "LER 3&sigma; unbiased", "LWR 3&sigma; unbiased",
            "LER 3&sigma; biased", "noise share", "status", "warnings"]
    parts = ["<h2>Every image</h2><p class='note'>Click a heading to sort. Values in nm; the noise share is of "
             "the edge variance. Images with a section of their own are linked.</p><table class='sortable'><thead><tr>"
             + "".join(f"<th>{h}</th>" for h in head) + "</tr></thead><tbody>"]
    for k, r in enumerate(meas.images):
        a, v = r.analysis, r.analysis.summary
        name = esc(r.name)
        if k < meas.settings.report_image_sections:
            name = f"<a href='#img{k}'>{name}</a>"
        cells = [name, esc(r.group), f"{r.pixel_size_nm:.4g} ({esc(r.pixel_size_source)})", str(v.n_lines),
                 _fmt(3 * v.edge.sigma_unbiased_nm), _fmt(3 * v.width.sigma_unbiased_nm),
                 _fmt(3 * v.edge.sigma_biased_nm), _pct(v.edge.noise_fraction), esc(a.status),
                 esc(", ".join(a.warning_codes))]
        parts.append("<tr>" + "".join(f"<td>{c}</td>" for c in cells) + "</tr>")
    parts.append("</tbody></table>")
    return "".join(parts)


def _footer(meas) -> str:
    esc = html.escape
    from datetime import datetime, timezone
    from importlib.metadata import PackageNotFoundError, version

    try:
        ver = version("quietedge")
    except PackageNotFoundError:      # a source tree that is not installed
        ver = "unknown (not installed)"
    px = sorted({(round(r.pixel_size_nm, 6), r.pixel_size_source) for r in meas.images})
    pixel = "; ".join(f"{p:g} nm ({esc(src)})" for p, src in px) or "none"
    settings = ", ".join(f"{k} = {esc(repr(v))}" for k, v in sorted(vars(meas.settings).items()))
    return (f"<footer><b>Provenance.</b> Written {datetime.now(timezone.utc).strftime('%Y-%m-%d %H:%M UTC')} by "
            f"quietedge {esc(ver)}. Pixel size: {pixel}. Settings: {settings}. Everything needed to reproduce the "
            "run is in settings.json beside this report.</footer>")


_SORT_JS = """
document.querySelectorAll('table.sortable th').forEach(function (th, col) {
  th.style.cursor = 'pointer';
  th.addEventListener('click', function () {
    var body = th.closest('table').tBodies[0];
    var rows = Array.prototype.slice.call(body.rows);
    var up = th.dataset.dir !== 'up';
    th.dataset.dir = up ? 'up' : 'down';
    rows.sort(function (a, b) {
      var x = a.cells[col].textContent, y = b.cells[col].textContent;
      var nx = parseFloat(x), ny = parseFloat(y);
      var c = (!isNaN(nx) && !isNaN(ny)) ? nx - ny : x.localeCompare(y);
      return up ? c : -c;
    });
    rows.forEach(function (r) { body.appendChild(r); });
  });
});
"""


def write_report(meas, path) -> Path:
    """Write the HTML report of a Measurement to ``path`` (a projection: nothing is recomputed).

    Top down: the verdict, the comparison (when groups were compared), every image in one
    table, the set's PSDs, failures, a section per image for the first
    ``meas.settings.report_image_sections`` images, and the provenance.
    """
    esc = html.escape
    s = meas.settings
    parts = [f"<!DOCTYPE html><html lang='en'><head><meta charset='utf-8'><title>quietedge roughness report</title>"
             f"<style>{_CSS}</style></head><body><h1>Roughness report</h1>"]
    parts.append(_verdict(meas))
    profile = f" ({esc(s.profile_model)} profile)" if s.detector == "model" else ""
    parts.append(f"<p class='note'>Detector: {esc(s.detector)}{profile}, detrend {esc(s.detrend)}, PSD window "
                 f"{esc(s.psd_window)}. <b>Biased</b> = as measured; <b>noise</b> = the part the edge-fit covariance "
                 "attributes to image noise; <b>unbiased</b> = biased minus noise (variances subtract). The noise "
                 "share is a share of the <i>variance</i>; the raw 3&sigma; is inflated by 1/&radic;(1 &minus; share) "
                 "(a 21% share inflates it by 12.5%). PSDs are one-sided. Check results against your site's own "
                 "metrology procedures before acting on them.</p>")
    if meas.comparison is not None:
        parts.append(_comparison_section(meas))
    if meas.images:
        parts.append(_images_table(meas))
    g = meas.overall
    if g is not None:
        parts.append("<h2>All images together</h2>" if meas.comparison is not None else "<h2>The whole set</h2>")
        parts.append(_table(g.summary, g.psd_model))
        if g.n_images > 1:
            parts.append(f"<p class='note'>The interval comes from resampling the {g.n_images} images as wholes: "
                         "it is the spread between images, which is why it is wider than one image's own "
                         "interval (that one only sees the spread between the lines of one image). With few "
                         "images it is wide; that is honest, not a defect.</p>")
        if g.n_grids > 1:
            parts.append(f"<p class='note'>The images have {g.n_grids} different row counts or pixel sizes: their "
                         "PSDs were interpolated onto the coarsest frequency resolution, up to the lowest Nyquist "
                         "frequency, and averaged weighted by edge length.</p>")
        if g.edge_psd is not None:
            fig, axes = _figure(figsize=(10, 3.6), ncols=2)
            d = g.edge_psd
            plot_psd(axes[0], d.frequency_per_nm, d.psd_biased_nm3, d.noise_floor_spectrum_nm3, g.psd_model,
                     title=f"edges, {d.n_traces} traces")
            if g.width_psd is not None:
                w = g.width_psd
                plot_psd(axes[1], w.frequency_per_nm, w.psd_biased_nm3, w.noise_floor_spectrum_nm3, None,
                         title=f"widths, {w.n_traces} lines")
            parts.append(f"<div><img alt='PSDs of all images' src='{_png(fig)}'></div>")
        if len(meas.groups) > 1 and meas.comparison is None:
            parts.append(_groups_section(meas.groups, s))
    if meas.failures:
        parts.append("<h2>Images that could not be measured</h2><table><tr><th>image</th><th>reason</th></tr>")
        for name, reason in meas.failures:
            parts.append(f"<tr><td>{esc(str(name))}</td><td>{esc(str(reason))}</td></tr>")
        parts.append("</table>")
    for k, r in enumerate(meas.images):
        if k == s.report_image_sections:
            parts.append(f"<p class='note'>{len(meas.images) - k} more image(s) are in the table above and in "
                         "summary.csv; figures are drawn for the first ones only.</p>")
            break
        parts.append(_image_section(k, r))
    parts.append("<p class='note'>Extra frames or a higher dose cut image noise but can shrink or damage resist "
                 "lines, which changes the roughness being measured.</p>")
    parts.append(_footer(meas))
    parts.append(f"<script>{_SORT_JS}</script></body></html>")
    path = Path(path)
    path.write_text("\n".join(parts), encoding="utf-8")
    return path


def _image_section(k, r) -> str:
    esc = html.escape
    a = r.analysis
    parts = [f"<h2 id='img{k}'>{esc(r.name)}</h2>"]
    if np.isfinite(r.pixel_size_nm):
        parts.append(f"<p class='note'>pixel size {r.pixel_size_nm:.4g} nm ({esc(r.pixel_size_source)})</p>")
    for code, text in a.warnings:
        parts.append(f"<div class='warn'><b>{esc(code)}</b>: {esc(text)}</div>")
    parts.append(_table(a.summary, a.psd_model, a.model_sigma_finite_nm))
    figs = []
    if r.preview is not None and r.traces is not None:
        rows, cols = r.preview.shape
        fig, ax = _figure(figsize=(4.2, max(2.0, min(8.0, 4.2 * rows / cols))))
        plot_overlay(ax, r.preview.astype(float), r.traces)
        figs.append((_png(fig), f"The first {rows} rows at their true aspect ratio, lines vertical"
                     f"{' (the image was turned: its lines ran along the scan)' if r.traces.rotated else ''}; "
                     "gold: fitted left edges, cyan: fitted right edges."))
    if r.traces is not None:
        fig, ax = _figure(figsize=(4, 4))
        plot_traces(ax, r.traces)
        figs.append((_png(fig), "Edge deviations from a straight line (gold left, cyan right edges)."))
    fig, ax = _figure(figsize=(4, 4))
    e = a.edge_psd
    plot_psd(ax, e.frequency_per_nm, e.mean_psd_nm3, e.mean_floor_spectrum_nm3, a.psd_model, title="edge PSD")
    figs.append((_png(fig), "Edge PSD: measured (orange), noise floor (grey), unbiased (blue), model (black)."))
    if np.any(np.isfinite(a.edges.achieved_sd_nm)):
        fig, ax = _figure(figsize=(4, 4))
        plot_precision(ax, a.edges)
        figs.append((_png(fig), "Precision per edge: achieved (purple), Cram&eacute;r&ndash;Rao bound (black), "
                                "the fit's own uncertainty (grey)."))
        parts.append(_precision_text(a))
    parts.append("<div class='figs'>" + "".join(
        f"<figure><img alt='figure of {esc(r.name)}' src='{u}'><figcaption>{cap}</figcaption></figure>"
        for u, cap in figs) + "</div>")
    parts.append(_edges_table(a.edges))
    return "".join(parts)


def _edges_table(d) -> str:
    """Per edge, folded away: position, roughness, precision, what was excluded and why."""
    esc = html.escape
    head = ["edge", "line", "side", "position (nm)", "3&sigma; unbiased (nm)", "noise share", "contrast-to-noise",
            "row precision (nm)", "Cram&eacute;r&ndash;Rao (nm)", "shrinkage", "failed rows", "excluded / flags"]
    rows = []
    for k in range(np.asarray(d.line).size):
        vb, vn = float(d.var_biased_nm2[k]), float(d.var_noise_nm2[k])
        vu = vb - vn
        note = "; ".join(x for x in (str(d.exclusion[k]), str(d.flags[k])) if x)
        cells = [str(k), str(int(d.line[k])), esc(str(d.side[k])), _fmt(d.mean_position_nm[k], 1),
                 _fmt(3 * math.sqrt(vu)) if vu > 0 else ("below the noise" if np.isfinite(vu) else "not measured"),
                 _pct(vn / vb) if vb > 0 else "not determined", _fmt(d.contrast_to_noise[k], 1),
                 _fmt(d.achieved_sd_nm[k], 3), _fmt(d.crlb_sd_nm[k], 3), _fmt(d.shrinkage[k], 3),
                 str(int(d.invalid_rows[k])), esc(note.replace("_", " "))]
        rows.append("<tr>" + "".join(f"<td>{c}</td>" for c in cells) + "</tr>")
    return ("<details><summary>Every edge of this image</summary><table class='sortable'><thead><tr>"
            + "".join(f"<th>{h}</th>" for h in head) + "</tr></thead><tbody>" + "".join(rows)
            + "</tbody></table></details>")


def _groups_section(groups, settings) -> str:
    esc = html.escape
    parts = [f"<h2>Groups side by side</h2><p class='note'>3&sigma; in nm. Frames: how many frames "
             f"(averaged) would bring the noise fraction below {100 * settings.noise_share_target:.0f}% of the "
             "variance, assuming noise variance falls as 1/frames. Lines: how many lines of this length give "
             f"&plusmn;{100 * settings.precision_target:.0f}% (1 sd) on the unbiased edge sigma.</p>"
             "<table><tr><th>group</th><th>images</th>"
             "<th>LER 3&sigma; biased</th><th>LER 3&sigma; unbiased</th><th>LWR 3&sigma; biased</th>"
             "<th>LWR 3&sigma; unbiased</th><th>noise fraction</th><th>xi (nm)</th><th>H</th>"
             "<th>frames</th><th>lines</th></tr>"]
    for g in groups:
        v, m = g.summary, g.psd_model
        parts.append(f"<tr><td>{esc(g.name)}</td><td>{g.n_images}</td>"
                     f"<td>{_fmt(3 * v.edge.sigma_biased_nm)}</td><td><b>{_fmt(3 * v.edge.sigma_unbiased_nm)}</b>"
                     f"</td><td>{_fmt(3 * v.width.sigma_biased_nm)}</td><td><b>{_fmt(3 * v.width.sigma_unbiased_nm)}"
                     f"</b></td><td>{_pct(v.edge.noise_fraction)}</td>"
                     f"<td>{_fmt(m.correlation_length_nm if m else math.nan, 1)}</td>"
                     f"<td>{_fmt(m.roughness_exponent if m else math.nan)}</td>"
                     f"<td>{_fmt(g.advice.frames_for_noise_target, 1)}</td>"
                     f"<td>{_fmt(g.advice.lines_for_precision_target, 0)}</td></tr>")
    parts.append("</table>")
    fig, ax = _figure(figsize=(6, 3))
    x = np.arange(len(groups))
    ax.bar(x - 0.2, [3 * g.summary.edge.sigma_biased_nm for g in groups], 0.4, color=_C["biased"], label="biased")
    ax.bar(x + 0.2, [3 * g.summary.edge.sigma_unbiased_nm for g in groups], 0.4, color=_C["unbiased"],
           label="unbiased")
    ax.set_xticks(x, [g.name for g in groups])
    ax.set_ylabel("LER 3$\\sigma$ (nm)")
    ax.legend(frameon=False, fontsize=8)
    parts.append(f"<div><img alt='groups' src='{_png(fig)}'></div>")
    return "".join(parts)


def plot_forest(ax, comparison, *, quantities=("edge", "width")):
    """Every pairwise difference (b - a, 3-sigma nm) with its interval: unbiased filled, biased open."""
    labels, y = [], 0
    names = {"edge": "LER", "width": "LWR", "centre": "placement"}
    for q in quantities:
        for d in [x for x in comparison.differences if x.quantity == f"{q}_sigma_unbiased_nm"]:
            raw = comparison.difference(d.group_a, d.group_b, f"{q}_sigma_biased_nm")
            for diff, style, off in ((d, dict(color=_C["unbiased"], fmt="o"), 0.15),
                                     (raw, dict(color=_C["biased"], fmt="o", mfc="white"), -0.15)):
                if np.isfinite(diff.difference_nm):
                    lo, hi = 3 * diff.difference_low_nm, 3 * diff.difference_high_nm
                    err = [[3 * diff.difference_nm - lo], [hi - 3 * diff.difference_nm]] if np.isfinite(lo) else None
                    ax.errorbar(3 * diff.difference_nm, y + off, xerr=err, capsize=3, ms=5, **style)
            labels.append(f"{names[q]}: {d.group_b} - {d.group_a}")
            y += 1
    ax.axvline(0, color="#444", lw=0.8)
    ax.set_yticks(range(len(labels)), labels, fontsize=8)
    ax.set_xlabel(f"difference of 3$\\sigma$ (nm), {100 * comparison.confidence:.0f}% intervals")
    ax.errorbar([], [], xerr=[], color=_C["unbiased"], fmt="o", label="unbiased (noise removed)")
    ax.errorbar([], [], xerr=[], color=_C["biased"], fmt="o", mfc="white", label="biased (raw)")
    ax.legend(fontsize=7, frameon=False, loc="lower center", bbox_to_anchor=(0.5, 1.0), ncol=2)
    ax.set_ylim(len(labels) - 0.5, -0.5)
    ax.grid(True, axis="x", alpha=0.25)
    return ax


def plot_group_psds(ax, groups):
    """Each group's pooled edge PSD: biased thin, unbiased bold, one colour per group."""
    for k, g in enumerate(groups):
        d = g.edge_psd
        if d is None:
            continue
        colour = _GROUP_COLOURS[k % len(_GROUP_COLOURS)]
        f, pb, pu = d.frequency_per_nm[1:], d.psd_biased_nm3[1:], d.psd_unbiased_nm3[1:]
        ax.loglog(f, pb, color=colour, lw=0.8, alpha=0.6, ls="--", label=f"{g.name} biased")
        pos = pu > 0
        ax.loglog(f[pos], pu[pos], color=colour, lw=1.6, label=f"{g.name} unbiased")
    ax.set_xlabel("spatial frequency (1/nm)")
    ax.set_ylabel("edge PSD, one-sided (nm$^3$)")
    ax.legend(fontsize=7, frameon=False, ncol=2)
    ax.grid(True, which="both", alpha=0.2)
    return ax


def _ci3(lo, hi):
    return f"{_fmt(3 * lo)} to {_fmt(3 * hi)}" if np.isfinite(lo) and np.isfinite(hi) else "not determined"


def _comparison_section(meas) -> str:
    esc = html.escape
    c = meas.comparison
    level = f"{100 * c.confidence:.0f}%"
    parts = ["<h2>Comparison of groups</h2><ul class='answers'>"]
    parts += [f"<li>{esc(t)}</li>" for t in comparison_sentences(c)]
    parts.append("</ul>")
    for code, text in c.notes:
        parts.append(f"<div class='warn'><b>{esc(code)}</b>: {esc(text)}</div>")
    many = len(c.estimates) > 2
    parts.append(f"<p class='note'>Differences are the second group minus the first, in 3&sigma; nm. Intervals and "
                 f"p-values: Welch t on bootstrap standard errors, resampling whole images (the lines of a single "
                 f"image for a group of one){'; p-values Holm-adjusted over the pairs' if many else ''}. "
                 "All differences, biased and unbiased, with ratios, are in compare.csv.</p>")
    parts.append("<table><tr><th>group</th><th>images</th><th>lines</th><th>LER 3&sigma; unbiased</th>"
                 f"<th>{level} interval</th><th>LER 3&sigma; biased</th><th>LWR 3&sigma; unbiased</th>"
                 f"<th>{level} interval</th><th>LWR 3&sigma; biased</th><th>noise share (LER variance)</th>"
                 "<th>inflation of raw 3&sigma;</th><th>frames to target</th><th>xi (nm)</th><th>H</th></tr>")
    checks = {(n.group, n.quantity): n for n in c.noise}
    for g in meas.groups:
        v, m = g.summary, g.psd_model
        n = checks.get((g.name, "edge"))
        xi = m.correlation_length_nm if (m is not None and not m.reason("correlation_length")) else math.nan
        h = m.roughness_exponent if (m is not None and not m.reason("roughness_exponent")) else math.nan
        flag = " class='flag'" if n is not None and n.flagged else ""
        parts.append(
            f"<tr><td>{esc(g.name)}</td><td>{g.n_images}</td><td>{v.n_lines}</td>"
            f"<td><b>{_fmt(3 * v.edge.sigma_unbiased_nm)}</b></td>"
            f"<td>{_ci3(v.edge.sigma_unbiased_low_nm, v.edge.sigma_unbiased_high_nm)}</td>"
            f"<td>{_fmt(3 * v.edge.sigma_biased_nm)}</td><td><b>{_fmt(3 * v.width.sigma_unbiased_nm)}</b></td>"
            f"<td>{_ci3(v.width.sigma_unbiased_low_nm, v.width.sigma_unbiased_high_nm)}</td>"
            f"<td>{_fmt(3 * v.width.sigma_biased_nm)}</td><td{flag}>{_pct(v.edge.noise_fraction)}</td>"
            f"<td{flag}>{_pct(n.inflation_3sigma) if n else 'not determined'}</td>"
            f"<td>{_fmt(n.frames_needed, 1) if n and n.flagged else 'within target'}</td>"
            f"<td>{_fmt(xi, 1)}</td><td>{_fmt(h)}</td></tr>")
    parts.append("</table>")
    figs = []
    n_rows = sum(1 for d in c.differences if d.quantity in ("edge_sigma_unbiased_nm", "width_sigma_unbiased_nm"))
    fig, ax = _figure(figsize=(5.2, 1.6 + 0.6 * n_rows))
    plot_forest(ax, c)
    figs.append(_png(fig))
    fig, ax = _figure(figsize=(5.2, 3.6))
    plot_group_psds(ax, meas.groups)
    figs.append(_png(fig))
    parts.append("<div class='figs2'>" + "".join(f"<img alt='comparison figure' src='{u}'>" for u in figs) + "</div>")
    parts.append("<h3>Is noise inflating these numbers?</h3><ul>")
    parts += [f"<li>{esc(t)}</li>" for t in noise_sentences(c)]
    parts.append("</ul><h3>How many images would settle it?</h3><ul>")
    parts += [f"<li>{esc(t)}</li>" for t in power_sentences(c)]
    parts.append("</ul>")
    return "".join(parts)
