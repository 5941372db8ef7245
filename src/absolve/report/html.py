"""The self-contained HTML report: one file, no network, figures inline as SVG.

The page is written as well-formed XHTML-compatible HTML (void elements
self-closed, every user string escaped with :func:`html.escape`), carries a
Content-Security-Policy that forbids loading anything from outside the file,
and prints cleanly (print styles keep figures and table rows whole and hide the
contents list).

Sections, in order: what was asked and the method (library, settings), what
needs attention, results, the batch at a glance, fits of individual scans, the
interferent screen, conditioning and selectivity, the uncertainty budget, any
further sections (a wavelength plan, a PLS comparison), provenance, cautions.
Tables stop after :data:`TABLE_ROWS` rows with a note; every number stays in
the result files.
"""

from __future__ import annotations

import html
from collections.abc import Sequence
from typing import TYPE_CHECKING, Any, Protocol

import numpy as np
from numpy.typing import NDArray

from ..library import ReferenceLibrary
from ..quantify import FLAG_TEXT, MixtureResult
from .figures import RenderedFigure

if TYPE_CHECKING:
    from ..inverse import InversePrediction

__all__ = ["CAUTIONS", "TABLE_ROWS", "build_model_report", "build_report", "comparison_section", "plan_section"]

TABLE_ROWS = 500

_STYLE = """
body{font-family:system-ui,-apple-system,'Segoe UI',Roboto,sans-serif;max-width:72rem;margin:1.5rem auto;padding:0 1rem;color:#1b1b1b;line-height:1.45}
h1{font-size:1.55rem;margin-bottom:.2rem} h2{font-size:1.2rem;border-bottom:1px solid #bbb;padding-bottom:.2rem;margin-top:2.2rem}
h3{font-size:1rem;margin:1.2rem 0 .3rem}
table{border-collapse:collapse;margin:.5rem 0;font-size:.86rem;font-variant-numeric:tabular-nums}
th,td{border:1px solid #ccc;padding:.22rem .45rem;text-align:right;vertical-align:top}
th{background:#eef1f4} td:first-child,th:first-child{text-align:left} td.text,th.text{text-align:left}
tr.flagged td:first-child{border-left:4px solid #D55E00}
.scroll{overflow-x:auto;max-width:100%}
.flag{color:#a34400;font-weight:600} .ok{color:#006b4f;font-weight:600} .note{font-size:.84rem;color:#444}
.small{font-size:.78rem;color:#555} code{font-size:.8rem;word-break:break-all}
.lead{font-size:1rem;margin:.2rem 0 .8rem}
.attention{border:1px solid #d9c4a8;background:#fdf8f1;padding:.5rem 1rem;margin:.8rem 0}
.attention ul{margin:.3rem 0;padding-left:1.2rem}
.clear{border:1px solid #a9d3c4;background:#f1faf6;padding:.5rem 1rem;margin:.8rem 0}
.caution{border-left:4px solid #a34400;padding:.4rem .8rem;background:#fbf5ef;font-size:.9rem}
nav ol{columns:2;font-size:.9rem;margin:.3rem 0}
dl.facts{display:grid;grid-template-columns:max-content auto;gap:.15rem 1rem;font-size:.9rem;margin:.5rem 0}
dl.facts dt{font-weight:600} dl.facts dd{margin:0}
figure{margin:.8rem 0 1.4rem;break-inside:avoid;page-break-inside:avoid;content-visibility:auto;contain-intrinsic-size:auto 40rem}
figure svg{width:100%;max-width:52rem;height:auto;display:block}
figcaption{font-size:.84rem;color:#333;max-width:48rem}
pre{font-size:.8rem;background:#f6f6f6;padding:.5rem;overflow-x:auto}
@page{margin:14mm}
@media print{
body{max-width:none;margin:0;padding:0;font-size:10pt}
nav{display:none}
h2,h3{break-after:avoid;page-break-after:avoid}
tr,figure,.attention{break-inside:avoid;page-break-inside:avoid}
figure{content-visibility:visible} figure svg{max-width:16cm}
thead{display:table-header-group}
.scroll{overflow:visible}
a{color:inherit;text-decoration:none}
}
"""

# The page may load nothing: no scripts, no fonts, no remote images; inline
# styles and data: images (rasterised parts of large figures) only.
_POLICY = "default-src 'none'; style-src 'unsafe-inline'; img-src data:"

CAUTIONS = (
    "These results support, and do not replace, validated analytical methods and licensed professional practice. "
    "Follow local regulations, your laboratory's quality system and the safety data sheets of every substance handled. "
    "Check each flagged result before use."
)


def _e(text: Any) -> str:
    return html.escape(str(text), quote=True)


def _num(value: float | None, spec: str = ".4g") -> str:
    if value is None or not np.isfinite(value):
        return "–"
    return format(float(value), spec)


def _p(value: float) -> str:
    """A p-value; below 0.0001 only the bound is worth showing."""
    return "&lt; 0.0001" if np.isfinite(value) and value < 1e-4 else _num(value, ".2g")


def _table(
    headers: Sequence[str], rows: Sequence[str], *, text: Sequence[int] = (), total: int | None = None, what: str = "rows", where: str = ""
) -> str:
    """A table from escaped header cells and pre-built ``<tr>`` rows, with a note when rows were left out.

    ``text`` lists the columns of words (left-aligned like their cells); the rest hold numbers.
    """
    head = "".join(f'<th class="text">{cell}</th>' if k in text else f"<th>{cell}</th>" for k, cell in enumerate(headers))
    body = "".join(rows)
    more = ""
    if total is not None and total > len(rows):
        more = f'<p class="note">Showing the first {len(rows)} of {total} {what}; all of them are in {_e(where)}.</p>'
    return f'<div class="scroll"><table><thead><tr>{head}</tr></thead><tbody>{body}</tbody></table></div>{more}'


def _page(title: str, body: Sequence[str]) -> str:
    head = (
        "<!DOCTYPE html>\n"
        '<html lang="en"><head><meta charset="utf-8" />'
        f'<meta http-equiv="Content-Security-Policy" content="{_POLICY}" />'
        '<meta name="viewport" content="width=device-width, initial-scale=1" />'
        f"<title>{_e(title)}</title><style>{_STYLE}</style></head><body>"
    )
    return "\n".join([head, *body, "</body></html>"]) + "\n"


def _used_flags(result: MixtureResult) -> list[str]:
    return sorted({f for scan in result.scan_flags for f in scan} | {f for scan in result.flags for per in scan for f in per})


def _scan_is_flagged(result: MixtureResult, scan: int) -> bool:
    return bool(result.scan_flags[scan]) or any(result.flags[scan][j] for j in range(len(result.components)))


# --------------------------------------------------------------------------- the report


def build_report(
    result: MixtureResult,
    library: ReferenceLibrary,
    provenance: dict[str, Any],
    *,
    figures: Sequence[RenderedFigure] = (),
    sections: Sequence[tuple[str, str]] = (),
    prediction: InversePrediction | None = None,
    title: str = "Mixture quantification",
) -> str:
    """HTML text of the report of a quantification.

    Parameters
    ----------
    result : MixtureResult
    library : ReferenceLibrary
        The library the result came from.
    provenance : dict
        Input files with SHA-256, options, version and time (``cli._common.provenance``).
    figures : sequence of RenderedFigure
        Drawn figures (:func:`absolve.report.figures.render_figures`); each is
        placed in the section its ``place`` names. Without figures the report
        has tables only.
    sections : sequence of (heading, html_fragment)
        Further sections from other steps (e.g. :func:`plan_section`), placed
        before the provenance; the fragments must already be escaped.
    prediction : InversePrediction, optional
        PLS predictions of the same scans: adds a comparison section.
    title : str

    Returns
    -------
    str
        The whole page.
    """
    placed = {place: [f for f in figures if f.place == place] for place in ("library", "overview", "residual-sizes", "scan")}
    detailed = {f.scan: f.key for f in placed["scan"] if f.scan is not None}
    extra = list(sections)
    if prediction is not None:
        extra.append(comparison_section(result, prediction))
    parts: list[tuple[str, str, str]] = [
        ("method", "What was asked and how it was answered", _method(result, library, provenance, placed["library"])),
    ]
    if placed["overview"] or placed["residual-sizes"]:
        parts.append(("batch", "The batch at a glance", "".join(_figure(f) for f in placed["overview"] + placed["residual-sizes"])))
    parts += [
        ("results", "Results", _results(result, detailed)),
        ("fits", "Fits of individual scans", _fits(result, placed["scan"])),
        ("screen", "Interferent screen", _screen(result)),
        ("conditioning", "Conditioning and selectivity", _conditioning(result)),
        ("budget", "Uncertainty budget", _budget(result)),
    ]
    parts += [(f"extra-{k + 1}", heading, fragment) for k, (heading, fragment) in enumerate(extra)]
    parts += [("provenance", "Provenance", _provenance(provenance, library)), ("cautions", "Cautions", f'<p class="caution">{_e(CAUTIONS)}</p>')]
    contents = "".join(f'<li><a href="#{anchor}">{_e(heading)}</a></li>' for anchor, heading, _ in parts)
    body = [
        f"<header><h1>{_e(title)}</h1>",
        f'<p class="lead">{_lead(result, provenance)}</p>',
        _attention(result, detailed),
        f"<nav><b>Contents</b><ol>{contents}</ol></nav></header>",
        *(f'<section id="{anchor}"><h2>{_e(heading)}</h2>{fragment}</section>' for anchor, heading, fragment in parts),
    ]
    return _page(title, body)


def _lead(result: MixtureResult, provenance: dict[str, Any]) -> str:
    flagged = sum(_scan_is_flagged(result, i) for i in range(result.n_scans))
    names = ", ".join(result.components)
    return (
        f"{result.n_scans} scan(s) quantified for {len(result.components)} component(s) ({_e(names)}) in {_e(result.unit)}; "
        f"{result.n_scans - flagged} without any flag, {flagged} with at least one. "
        f"Run {_e(provenance.get('created', '?'))} with absolve {_e(provenance.get('version', '?'))}."
    )


def _scan_link(result: MixtureResult, scan: int, detailed: dict[int, str]) -> str:
    name = _e(result.scan_names[scan])
    return f'<a href="#fig-{_e(detailed[scan])}">{name}</a>' if scan in detailed else name


def _attention(result: MixtureResult, detailed: dict[int, str], shown: int = 6) -> str:
    """What to worry about: every flag that occurs, how many scans carry it, the first few, and what it means."""
    items = []
    for flag in _used_flags(result):
        scans = [i for i in range(result.n_scans) if flag in result.scan_flags[i] or any(flag in per for per in result.flags[i])]
        names = ", ".join(_scan_link(result, i, detailed) for i in scans[:shown])
        more = f" and {len(scans) - shown} more" if len(scans) > shown else ""
        chance = ""
        if flag == "interferent":
            chance = " " + _e(result.screening.batch_note())
        items.append(f'<li><span class="flag">{_e(flag)}</span> in {len(scans)} scan(s) ({names}{more}): {_e(FLAG_TEXT[flag])}.{chance}</li>')
    if not items:
        return '<div class="clear"><span class="ok">Nothing needs attention:</span> no scan or result carries a flag.</div>'
    return f'<div class="attention"><b>What needs attention</b><ul>{"".join(items)}</ul></div>'


def _figure(figure: RenderedFigure) -> str:
    return f'<figure id="fig-{_e(figure.key)}">{figure.svg}<figcaption>{_e(figure.caption)}</figcaption></figure>'


# --------------------------------------------------------------------------- method and library


def _method(result: MixtureResult, library: ReferenceLibrary, provenance: dict[str, Any], figures: Sequence[RenderedFigure]) -> str:
    settings = result.settings
    low, high = settings.get("wavelength_range_nm", [result.wavelengths[0], result.wavelengths[-1]])
    inputs = ", ".join(item["file"] for item in provenance.get("inputs", []))
    question = (
        f"<p><b>The question:</b> how much of each of {len(result.components)} components ({_e(', '.join(result.components))}) "
        f"is in each of {result.n_scans} sample scan(s), and how sure is each number? Files read: {_e(inputs or 'not recorded')}.</p>"
    )
    method = (
        "<p><b>The method:</b> each scan's absorbance on the used wavelengths "
        f"({_num(low, 'g')}–{_num(high, 'g')} nm) is modelled by the Beer-Lambert law as the sum of the components' "
        f"absorptivity spectra from the reference library times their concentrations and the path length "
        f"({_num(settings.get('path_length_cm', 1.0), 'g')} cm), plus free baseline terms ({_e(settings.get('baseline', '?'))}); "
        "concentrations are found by non-negative least squares and multiplied by the dilution factor "
        f"({_num(settings.get('dilution', 1.0), 'g')}). Uncertainties combine spectral noise (correlated along wavelength), "
        "the calibration's absorptivity uncertainty, and any path-length and dilution tolerances by the GUM law of "
        "propagation; the expanded uncertainty uses a coverage factor from the effective degrees of freedom (about 95 %). "
        "Points that are saturated, above the library's working range or above the instrument ceiling are left out. "
        "An interferent screen then tests each residual for structure the library does not explain.</p>"
    )
    setting_rows = "".join(f'<tr><td>{_e(key.replace("_", " "))}</td><td class="text">{_e(_setting_text(value))}</td></tr>' for key, value in settings.items())
    return (
        question
        + method
        + "<h3>Reference library</h3>"
        + _library(library)
        + "".join(_figure(f) for f in figures)
        + "<h3>Settings used</h3>"
        + _table(["setting", "value"], [setting_rows], text=[1])
    )


def _setting_text(value: Any) -> str:
    if isinstance(value, dict):  # a step's own record (e.g. the learned library error) says what it did
        return str(value.get("message", value))
    if isinstance(value, float):
        return format(value, "g")
    if isinstance(value, (list, tuple)):
        if all(v is None for v in value):
            return "not set"
        return " – ".join("open" if v is None else _setting_text(v) for v in value)
    return "not set" if value is None else str(value)


def _linear_limit(levels: int, limit: float | None) -> str:
    if limit is not None:
        return _num(limit, ".3f")
    return "no standards" if levels == 0 else "linear throughout"


def _library(library: ReferenceLibrary) -> str:
    summary = library.summary()
    unit = _e(library.unit)
    rows = []
    for info, item in zip(library.components, summary["components"]):
        span = item["concentration_range"]
        linearity = []
        if info.curvature_p is not None:
            linearity.append(f"curvature p {_num(info.curvature_p, '.2g')}")
        if info.lack_of_fit_p is not None:
            linearity.append(f"lack of fit p {_num(info.lack_of_fit_p, '.2g')}")
        rows.append(
            f"<tr><td>{_e(info.name)}</td><td>{_num(item['peak_wavelength_nm'], 'g')}</td>"
            f"<td>{_num(item['peak_absorptivity'], '.5g')} ± {_num(item['peak_std_error'], '.2g')}</td>"
            f"<td>{info.levels}</td><td>{'–' if span is None else f'{span[0]:g}–{span[1]:g}'}</td>"
            f"<td>{_num(info.r_squared, '.5f')}</td><td class='text'>{_e('; '.join(linearity) or '–')}</td>"
            f"<td>{_linear_limit(info.levels, info.linear_limit_absorbance)}</td>"
            f"<td class='text'>{_e('; '.join(info.warnings) or 'none')}</td></tr>"
        )
    table = _table(
        ["component", "peak (nm)", f"absorptivity at peak ± se (absorbance per {unit} per cm)", "levels", f"standards ({unit})",
         "R² at peak", "linearity tests", "absorbance where the standards leave the line", "calibration warnings"],
        rows,
        text=[6, 8],
    )
    noise = library.noise
    noise_text = (
        "none (uncertainty from each scan's own residual)"
        if noise is None
        else f"sd = √({noise.floor:.2g}² + ({noise.proportional:.2g} × A)²), correlation length {noise.correlation_length_nm:.2g} nm"
    )
    limit = library.linear_limit_absorbance
    sources = ", ".join(item.get("file", "?") for item in library.provenance.get("inputs", []))
    facts = [
        ("wavelengths", f"{summary['wavelength_range_nm'][0]:g}–{summary['wavelength_range_nm'][1]:g} nm ({summary['n_wavelengths']} points)"),
        ("working range", "not limited by the standards" if limit is None else f"measured absorbance up to {limit:.3f}"),
        ("noise model", noise_text),
        ("stray light", "none found" if library.stray_light == 0 else f"{library.stray_light:.2%} of the light; samples are corrected the same way"),
        ("degrees of freedom of the absorptivities", str(library.residual_dof) if library.residual_dof > 0 else "not known"),
        ("built from", sources or "not recorded"),
    ]
    listing = "".join(f"<dt>{_e(key)}</dt><dd>{_e(value)}</dd>" for key, value in facts)
    return table + f'<dl class="facts">{listing}</dl>'


# --------------------------------------------------------------------------- results


def _value_cell(result: MixtureResult, i: int, j: int) -> str:
    c, u, up, lod = result.concentration[i, j], result.expanded_uncertainty[i, j], result.upper_limit[i, j], result.lod[i, j]
    if not np.isfinite(c):
        text = "no result"
    elif np.isfinite(up):
        text = f"&lt; {_num(up, '.3g')}"
    else:
        text = f"{_num(c)} ± {_num(u, '.2g')}"
    flags = result.flags[i][j]
    mark = f'<br /><span class="flag">{_e(", ".join(flags))}</span>' if flags else ""
    return f'<td>{text}<br /><span class="small">LOD {_num(lod, ".2g")}</span>{mark}</td>'


def _results(result: MixtureResult, detailed: dict[int, str]) -> str:
    shown = min(result.n_scans, TABLE_ROWS)
    rows = []
    for i in range(shown):
        cells = "".join(_value_cell(result, i, j) for j in range(len(result.components)))
        scan_flags = ", ".join(result.scan_flags[i])
        verdict = f'<span class="flag">{_e(scan_flags)}</span>' if scan_flags else '<span class="ok">ok</span>'
        css = ' class="flagged"' if _scan_is_flagged(result, i) else ""
        rows.append(f"<tr{css}><td>{_scan_link(result, i, detailed)}</td>{cells}<td class='text'>{verdict}</td></tr>")
    headers = ["scan", *(f"{_e(c)} ({_e(result.unit)})" for c in result.components), "scan flags"]
    k = result.coverage_factor[np.isfinite(result.coverage_factor)]
    coverage = f"coverage factor k ≈ {np.median(k):.2f}" if k.size else "no coverage factor (no uncertainty)"
    note = (
        f'<p class="note">Each cell: concentration ± expanded uncertainty ({coverage}, about 95 %), then the limit of detection '
        "in this mixture. “&lt; x” is an upper limit for a component held at zero. Scan names link to their figure where one was drawn.</p>"
    )
    used = _used_flags(result)
    meanings = "".join(f"<li><b>{_e(flag)}</b>: {_e(FLAG_TEXT[flag])}.</li>" for flag in used)
    notes = f"<h3>What the flags mean</h3><ul>{meanings}</ul>" if used else '<p class="ok">No flags.</p>'
    return note + _table(headers, rows, text=[len(headers) - 1], total=result.n_scans, what="scans", where="results.csv") + notes


# --------------------------------------------------------------------------- figures of scans


def _fits(result: MixtureResult, figures: Sequence[RenderedFigure]) -> str:
    if not figures:
        return '<p class="note">No scan figures were drawn for this report.</p>'
    flagged_total = sum(_scan_is_flagged(result, i) for i in range(result.n_scans))
    drawn_flagged = sum(1 for f in figures if f.scan is not None and _scan_is_flagged(result, f.scan))
    intro = (
        f'<p class="note">{len(figures)} of {result.n_scans} scan(s) drawn: the first scans of the batch and the flagged ones, '
        "most strongly flagged first. Upper panel: measured absorbance (black), the fit (dashed) and each component's share; "
        "grey columns are points the fit did not use. Lower panel: the residual against the band of ±2 standard deviations "
        "expected from the instrument noise; a yellow region is where the interferent screen located something unexplained.</p>"
    )
    left = flagged_total - drawn_flagged
    if left > 0:
        intro += f'<p class="note">{left} further flagged scan(s) are not drawn (raise --detail to draw more); they are listed in fit.csv.</p>'
    return intro + "".join(_figure(f) for f in figures)


# --------------------------------------------------------------------------- screening


def _screen(result: MixtureResult) -> str:
    screening = result.screening
    untestable = int(np.isnan(screening.p_value).sum())
    flagged = np.flatnonzero(screening.flagged)
    intro = (
        f"<p>The residual of every scan was tested for structure the library does not explain ({_e(screening.method)}), "
        f"at a false-alarm rate of {screening.alpha:g} per scan: <b>{flagged.size}</b> of {screening.n_scans} scan(s) flagged"
        + (f", {untestable} could not be tested" if untestable else "")
        + f". {_e(screening.batch_note())}</p>"
    )
    if flagged.size == 0:
        return intro
    order = flagged[np.lexsort((flagged, np.nan_to_num(screening.p_value[flagged], nan=1.0)))][:TABLE_ROWS]
    rows = []
    for i in order:
        diagnosis = screening.diagnoses[i]
        if diagnosis is None:
            detail = '<td class="text">–</td><td>–</td><td>–</td><td>–</td><td class="text">no diagnosis</td>'
        else:
            detail = (
                f'<td class="text">{_e(diagnosis.kind)}</td><td class="text">{_e(diagnosis.confidence)}</td>'
                f"<td>{diagnosis.window_nm[0]:g}–{diagnosis.window_nm[1]:g}</td><td>{_num(diagnosis.size_absorbance, '.2g')}</td>"
                f'<td class="text">{_e(diagnosis.message)}</td>'
            )
        rows.append(f"<tr><td>{_e(result.scan_names[i])}</td><td>{_p(screening.p_value[i])}</td>{detail}</tr>")
    headers = ["scan", "p-value", 'looks like', 'how sure', "region (nm)",
               "size (absorbance)", 'diagnosis']
    return intro + "<h3>Flagged scans, strongest evidence first</h3>" + _table(headers, rows, text=[2, 3, 6], total=int(flagged.size), what="flagged scans", where="fit.csv")


# --------------------------------------------------------------------------- conditioning


def _spread(values: NDArray[np.float64], worst: str) -> str:
    finite = values[np.isfinite(values)]
    if not finite.size:
        return "–"
    typical = float(np.median(finite))
    extreme = float(finite.min() if worst == "min" else finite.max())
    return _num(typical, ".3g") if np.isclose(typical, extreme, rtol=1e-3) else f"{_num(typical, '.3g')} (worst {_num(extreme, '.3g')})"


def _conditioning(result: MixtureResult) -> str:
    intro = (
        "<p>How well the components can be told apart on the used points. The condition number (columns scaled to unit length) "
        "says how much relative errors can be amplified; selectivity is the share of a component's spectrum that no other "
        "component or baseline term can imitate (1 = fully distinct), and variance inflation (1 / selectivity²) is how many times "
        "the overlap inflates its variance; above 10 the scan is flagged ill-conditioned. Values differ between scans only "
        "where different points were used; the table gives the median and the worst scan.</p>"
    )
    condition = f"<p>Condition number: {_spread(result.condition_number, 'max')}.</p>"
    rows = [
        f"<tr><td>{_e(c)}</td><td>{_spread(result.sensitivity[:, j], 'min')}</td><td>{_spread(result.selectivity[:, j], 'min')}</td>"
        f"<td>{_spread(result.variance_inflation[:, j], 'max')}</td></tr>"
        for j, c in enumerate(result.components)
    ]
    table = _table(["component", f"sensitivity (absorbance per {_e(result.unit)} in the cell)", "selectivity", "variance inflation"], rows)
    return intro + condition + table + "<h3>Fit of each scan</h3>" + _fit_table(result)


def _fit_table(result: MixtureResult) -> str:
    shown = min(result.n_scans, TABLE_ROWS)
    excluded = sum(result.excluded.values())
    rows = []
    for i in range(shown):
        verdict = "not tested" if np.isnan(result.screening.p_value[i]) else ("flagged" if result.interferent[i] else "clear")
        css = ' class="flagged"' if result.interferent[i] else ""
        rows.append(
            f"<tr{css}><td>{_e(result.scan_names[i])}</td><td>{_num(result.rms_residual[i], '.2g')}</td>"
            f"<td>{_num(result.noise_scale[i], '.3g')}</td><td>{_p(result.residual_p_value[i])}</td>"
            f"<td>{_p(result.screening.p_value[i])}</td><td class='text'>{verdict}</td>"
            f"<td>{int(result.used[i].sum())}</td><td>{int(excluded[i])}</td><td>{_num(result.condition_number[i], '.3g')}</td></tr>"
        )
    headers = ["scan", "rms residual (absorbance)", "noise scale", "residual p", "screen p", 'screen',
               "points used", "points left out", "condition number"]
    note = (
        '<p class="note">Noise scale: residual variance over the noise model’s (1 when the scan is as noisy as the standards); '
        "residual p: chi-square test of the whitened residual; screen p: the interferent screen.</p>"
    )
    return note + _table(headers, rows, text=[5], total=result.n_scans, what="scans", where="fit.csv")


# --------------------------------------------------------------------------- uncertainty budget


_SOURCES = (
    ("spectral_noise", "spectral noise"),
    ("absorptivity", "absorptivity"),
    ("path_length", "path length"),
    ("dilution", "dilution"),
)


def _budget(result: MixtureResult) -> str:
    """Share of each source in the variance of each component, median over the scans that have one."""
    combined = result.std_uncertainty
    rows = []
    with np.errstate(invalid="ignore", divide="ignore"):
        for j, component in enumerate(result.components):
            ok = np.isfinite(combined[:, j]) & (combined[:, j] > 0)
            cells = []
            for key, _ in _SOURCES:
                share = (np.asarray(result.budget[key])[ok, j] / combined[ok, j]) ** 2 if key in result.budget else np.array([])
                cells.append(f"<td>{_num(100 * float(np.median(share)), '.1f') + ' %' if share.size else '–'}</td>")
            rows.append(
                f"<tr><td>{_e(component)}</td><td>{_num(float(np.median(combined[ok, j])) if ok.any() else np.nan, '.2g')}</td>"
                f"{''.join(cells)}<td>{_num(float(np.median(result.coverage_factor[ok, j])) if ok.any() else np.nan, '.3g')}</td></tr>"
            )
    basis = "the median over the scans" if result.n_scans > 1 else "this scan"
    note = (
        f'<p class="note">Standard uncertainty and the share of its variance from each source ({basis}; shares of the variance '
        "add up to 100 %). A large absorptivity share means better standards would help most; a large spectral-noise share, "
        "more light or replicate scans.</p>"
    )
    headers = ["component", f"standard uncertainty ({_e(result.unit)})", *(label for _, label in _SOURCES), "coverage factor k"]
    return note + _table(headers, rows)


# --------------------------------------------------------------------------- provenance


def _provenance(provenance: dict[str, Any], library: ReferenceLibrary | None = None) -> str:
    inputs = [
        f"<tr><td>{_e(item.get('file', '?'))}</td><td class='text'>read by this run</td><td class='text'><code>{_e(item.get('sha256', '?'))}</code></td></tr>"
        for item in provenance.get("inputs", [])
    ]
    if library is not None:
        inputs += [
            f"<tr><td>{_e(item.get('file', '?'))}</td><td class='text'>used to build the library</td><td class='text'><code>{_e(item.get('sha256', '?'))}</code></td></tr>"
            for item in library.provenance.get("inputs", [])
        ]
    options = "".join(
        f"<tr><td>{_e(key.replace('_', ' '))}</td><td class='text'>{_e(_setting_text(value))}</td></tr>" for key, value in provenance.get("options", {}).items()
    )
    return (
        f"<p>Made by absolve {_e(provenance.get('version', '?'))} (Python {_e(provenance.get('python', '?'))}) at "
        f"{_e(provenance.get('created', '?'))}.</p>"
        + _table(["file", "role", "SHA-256"], inputs, text=[1, 2])
        + "<h3>Options given</h3>"
        + _table(["option", "value"], [options], text=[1])
    )


# --------------------------------------------------------------------------- further sections


class _Plan(Protocol):
    def report(self) -> str: ...


def plan_section(plan: _Plan, figure_svg: str | None = None) -> tuple[str, str]:
    """A report section for a wavelength plan: its own text report and, when given, its figure.

    Parameters
    ----------
    plan : object with ``report() -> str``
        A :class:`absolve.planning.WavelengthPlan`.
    figure_svg : str, optional
        An inline ``<svg>`` element (see :func:`absolve.report.figures.figure_svg`).

    Returns
    -------
    (heading, html_fragment)
        For ``build_report(..., sections=[...])``.
    """
    figure = f"<figure>{figure_svg}</figure>" if figure_svg else ""
    return "Wavelength plan", f"<pre>{_e(plan.report())}</pre>{figure}"


def comparison_section(result: MixtureResult, prediction: InversePrediction) -> tuple[str, str]:
    """A report section comparing library (NNLS) and PLS results for the scans and components both have.

    The normalised difference is ``(c_nnls - c_pls) / sqrt(U_nnls^2 + U_pls^2)``
    with U the expanded uncertainties (PLS: twice its standard uncertainty);
    beyond 1 the two methods disagree by more than their stated uncertainties.

    Returns
    -------
    (heading, html_fragment)
    """
    scans = {name: i for i, name in enumerate(prediction.names)}
    components = [(j, prediction.components.index(c)) for j, c in enumerate(result.components) if c in prediction.components]
    rows = []
    total = 0
    for i, name in enumerate(result.scan_names):
        if name not in scans:
            continue
        for j, k in components:
            total += 1
            if len(rows) >= TABLE_ROWS:
                continue
            p = scans[name]
            a, ua = result.concentration[i, j], result.expanded_uncertainty[i, j]
            b, ub = prediction.concentration[p, k], 2.0 * prediction.std_uncertainty[p, k]
            score = (a - b) / np.hypot(ua, ub) if np.isfinite(ua) and np.isfinite(ub) and np.hypot(ua, ub) > 0 else np.nan
            css = ' class="flagged"' if np.isfinite(score) and abs(score) > 1 else ""
            rows.append(
                f"<tr{css}><td>{_e(name)}</td><td class='text'>{_e(result.components[j])}</td><td>{_num(a)} ± {_num(ua, '.2g')}</td>"
                f"<td>{_num(b)} ± {_num(ub, '.2g')}</td><td>{_num(a - b, '.3g')}</td><td>{_num(score, '.2f')}</td></tr>"
            )
    if not rows:
        return "Library and PLS compared", '<p class="note">The PLS predictions share no scan and component with this result.</p>'
    note = (
        f'<p class="note">Concentrations in {_e(result.unit)} from the library fit and from the PLS model '
        f"({_e(prediction.unit)}); normalised difference = difference / √(U₁² + U₂²); beyond 1 (marked) the methods disagree "
        "by more than their uncertainties.</p>"
    )
    headers = ["scan", 'component', "library fit", "PLS", "difference", "normalised difference"]
    return "Library and PLS compared", note + _table(headers, rows, text=[1], total=total, what="rows", where="results.csv")


# --------------------------------------------------------------------------- PLS report


def build_model_report(prediction: InversePrediction, provenance: dict[str, Any]) -> str:
    """HTML report of a PLS prediction: results with uncertainties, Q and T^2 against their limits."""
    head = [f"{_e(c)} ({_e(prediction.unit)})" for c in prediction.components]
    rows = []
    for i, name in enumerate(prediction.names[:TABLE_ROWS]):
        cells = "".join(
            f"<td>{_num(prediction.concentration[i, j])} ± {_num(2 * prediction.std_uncertainty[i, j], '.2g')}"
            + ('<br /><span class="flag">beyond-calibration</span>' if prediction.beyond_range[i, j] else "")
            + "</td>"
            for j in range(len(prediction.components))
        )
        verdict = '<span class="flag">outside-model</span>' if prediction.outside[i] else '<span class="ok">ok</span>'
        css = ' class="flagged"' if prediction.outside[i] else ""
        rows.append(
            f"<tr{css}><td>{_e(name)}</td>{cells}<td>{_num(prediction.q_residual[i], '.3g')}</td>"
            f"<td>{_num(prediction.hotelling_t2[i], '.3g')}</td><td class='text'>{verdict}</td></tr>"
        )
    headers = ["scan", *head, f"Q (limit {_num(prediction.q_limit, '.3g')})", f"T² (limit {_num(prediction.t2_limit, '.3g')})",
               'flags']
    body = _table(headers, rows, text=[len(headers) - 1], total=len(prediction.names), what="scans", where="results.csv") + (
        f"<p class='note'>± is twice the standard uncertainty ({_e(prediction.uncertainty_basis)}). "
        "outside-model: the scan is unlike the training scans (Q or T² beyond its limit); do not trust its values. "
        "beyond-calibration: the value lies outside the training concentrations.</p>"
    )
    return _page(
        "PLS quantification",
        [
            "<h1>PLS quantification</h1>",
            f'<section id="results"><h2>Results</h2>{body}</section>',
            f'<section id="provenance"><h2>Provenance</h2>{_provenance(provenance)}</section>',
            f'<section id="cautions"><h2>Cautions</h2><p class="caution">{_e(CAUTIONS)}</p></section>',
        ],
    )
