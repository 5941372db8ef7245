"""The self-contained HTML report: one file, no network, figures inline as SVG."""

from __future__ import annotations

import html
from collections.abc import Sequence
from typing import Any

import numpy as np

from ..inverse import InversePrediction
from ..library import ReferenceLibrary
from ..quantify import FLAG_TEXT, MixtureResult

__all__ = ["build_model_report", "build_report"]

_STYLE = """
body{font-family:system-ui,-apple-system,'Segoe UI',sans-serif;max-width:68rem;margin:1.5rem auto;padding:0 1rem;color:#1b1b1b;line-height:1.45}
h1{font-size:1.5rem;margin-bottom:.2rem} h2{font-size:1.2rem;border-bottom:1px solid #bbb;padding-bottom:.2rem;margin-top:2rem}
table{border-collapse:collapse;margin:.6rem 0;font-size:.9rem} th,td{border:1px solid #ccc;padding:.25rem .5rem;text-align:right}
th{background:#f0f0f0} td:first-child,th:first-child{text-align:left}
.flag{color:#8a3b00;font-weight:600} .ok{color:#205c20} .note{font-size:.85rem;color:#444}
.caution{border-left:4px solid #8a3b00;padding:.4rem .8rem;background:#fbf5ef;font-size:.9rem}
figure{margin:.5rem 0;page-break-inside:avoid} svg{max-width:100%;height:auto}
@media print{body{max-width:none} h2{page-break-after:avoid}}
"""

CAUTIONS = (
    "These results support, and do not replace, validated analytical methods and licensed professional practice. "
    "Follow local regulations, your laboratory's quality system and the safety data sheets of every substance handled. "
    "Check each flagged result before use."
)


def _e(text: Any) -> str:
    return html.escape(str(text), quote=True)


def _num(value: float, spec: str = ".4g") -> str:
    return format(float(value), spec) if np.isfinite(value) else "–"


def build_report(
    result: MixtureResult,
    library: ReferenceLibrary,
    provenance: dict[str, Any],
    *,
    figures: Sequence[tuple[str, str]] = (),
    sections: Sequence[tuple[str, str]] = (),
    title: str = "Mixture quantification",
) -> str:
    """HTML text of the report.

    Parameters
    ----------
    figures : sequence of (caption, svg_text)
        Figures to inline, in order.
    sections : sequence of (heading, html_fragment)
        Further sections supplied by other steps (screening, plan, PLS); the
        fragments must already be escaped.
    """
    parts = [
        "<!DOCTYPE html>",
        '<html lang="en"><head><meta charset="utf-8">',
        '<meta name="viewport" content="width=device-width, initial-scale=1">',
        f"<title>{_e(title)}</title><style>{_STYLE}</style></head><body>",
        f"<h1>{_e(title)}</h1>",
        f'<p class="note">{result.n_scans} scan(s), {len(result.components)} component(s): '
        f"{_e(', '.join(result.components))}; unit {_e(result.unit)}.</p>",
        "<h2>Results</h2>",
        _results_table(result),
        _flag_notes(result),
        "<h2>Fit quality and conditioning</h2>",
        _fit_table(result),
        "<h2>Method</h2>",
        _method(result, library),
    ]
    for caption, svg in figures:
        parts.append(f"<figure>{svg}<figcaption class='note'>{_e(caption)}</figcaption></figure>")
    for heading, fragment in sections:
        parts.append(f"<h2>{_e(heading)}</h2>{fragment}")
    parts += ["<h2>Provenance</h2>", _provenance(provenance), "<h2>Cautions</h2>", f'<p class="caution">{_e(CAUTIONS)}</p>', "</body></html>"]
    return "\n".join(parts) + "\n"


def _results_table(result: MixtureResult, limit: int = 500) -> str:
    head = "".join(f"<th>{_e(c)} ({_e(result.unit)})</th>" for c in result.components)
    rows = []
    for i in range(min(result.n_scans, limit)):
        cells = []
        for j in range(len(result.components)):
            c, u, up = result.concentration[i, j], result.expanded_uncertainty[i, j], result.upper_limit[i, j]
            text = f"&lt; {_num(up, '.3g')}" if np.isfinite(up) else f"{_num(c)} ± {_num(u, '.2g')}"
            flags = [f for f in result.flags[i][j]]
            mark = f' <span class="flag">{_e(", ".join(flags))}</span>' if flags else ""
            cells.append(f"<td>{text}{mark}</td>")
        scan_flags = ", ".join(result.scan_flags[i])
        verdict = f'<span class="flag">{_e(scan_flags)}</span>' if scan_flags else '<span class="ok">ok</span>'
        rows.append(f"<tr><td>{_e(result.scan_names[i])}</td>{''.join(cells)}<td>{verdict}</td></tr>")
    more = f'<p class="note">… {result.n_scans - limit} more scans in results.csv</p>' if result.n_scans > limit else ""
    k = result.coverage_factor[np.isfinite(result.coverage_factor)]
    note = f'<p class="note">± is the expanded uncertainty with coverage factor k ≈ {np.median(k):.2f} (about 95 %); &lt; x is an upper limit.</p>' if k.size else ""
    return f"<table><tr><th>scan</th>{head}<th>flags</th></tr>{''.join(rows)}</table>{more}{note}"


def _flag_notes(result: MixtureResult) -> str:
    used = sorted({f for scan in result.scan_flags for f in scan} | {f for scan in result.flags for per in scan for f in per})
    if not used:
        return '<p class="ok">No flags.</p>'
    items = "".join(f"<li><b>{_e(flag)}</b>: {_e(FLAG_TEXT[flag])}</li>" for flag in used)
    return f"<ul>{items}</ul>"


def _fit_table(result: MixtureResult, limit: int = 500) -> str:
    rows = []
    for i in range(min(result.n_scans, limit)):
        excluded = sum(int(v[i]) for v in result.excluded.values())
        rows.append(
            f"<tr><td>{_e(result.scan_names[i])}</td><td>{_num(result.rms_residual[i], '.2g')}</td>"
            f"<td>{_num(result.condition_number[i], '.3g')}</td><td>{_num(result.residual_p_value[i], '.2g')}</td>"
            f"<td>{'yes' if result.interferent[i] else 'no'}</td><td>{int(result.used[i].sum())}</td><td>{excluded}</td></tr>"
        )
    selectivity = "".join(
        f"<tr><td>{_e(c)}</td><td>{_num(result.sensitivity[0, j])}</td><td>{_num(result.selectivity[0, j], '.3f')}</td><td>{_num(result.variance_inflation[0, j], '.3g')}</td></tr>"
        for j, c in enumerate(result.components)
    )
    return (
        "<table><tr><th>scan</th><th>rms residual</th><th>condition number</th><th>residual p</th><th>interferent</th>"
        f"<th>points used</th><th>points excluded</th></tr>{''.join(rows)}</table>"
        '<p class="note">Sensitivity (net analyte signal per unit concentration), selectivity and variance inflation '
        f"on the first scan's points:</p><table><tr><th>component</th><th>sensitivity</th><th>selectivity</th><th>variance inflation</th></tr>{selectivity}</table>"
    )


def _method(result: MixtureResult, library: ReferenceLibrary) -> str:
    settings = result.settings
    rows = "".join(f"<tr><td>{_e(key)}</td><td>{_e(value)}</td></tr>" for key, value in settings.items())
    comp = "".join(
        f"<tr><td>{_e(c.name)}</td><td>{_num(c.peak_wavelength_nm, 'g')}</td><td>{c.levels}</td>"
        f"<td>{_e('–' if c.concentration_range is None else f'{c.concentration_range[0]:g}–{c.concentration_range[1]:g}')}</td>"
        f"<td>{_num(c.r_squared if c.r_squared is not None else np.nan, '.5f')}</td><td>{_e('; '.join(c.warnings) or '–')}</td></tr>"
        for c in library.components
    )
    return (
        "<p>Concentrations by non-negative least squares on whole scans (Beer-Lambert law, components' absorptivity "
        "spectra from the reference library, free baseline terms). Uncertainties combine spectral noise (correlated along "
        "wavelength), absorptivity uncertainty from the calibration, and any path-length and dilution tolerances, following "
        "the GUM law of propagation.</p>"
        f"<table><tr><th>component</th><th>peak nm</th><th>levels</th><th>range ({_e(library.unit)})</th><th>R²</th><th>calibration notes</th></tr>{comp}</table>"
        f"<table><tr><th>option</th><th>value</th></tr>{rows}</table>"
    )


def _provenance(provenance: dict[str, Any]) -> str:
    inputs = "".join(f"<tr><td>{_e(i['file'])}</td><td><code>{_e(i['sha256'])}</code></td></tr>" for i in provenance.get("inputs", []))
    return (
        f"<p class='note'>absolve {_e(provenance.get('version', '?'))}, Python {_e(provenance.get('python', '?'))}, "
        f"run {_e(provenance.get('created', '?'))}.</p><table><tr><th>input</th><th>SHA-256</th></tr>{inputs}</table>"
    )


def build_model_report(prediction: InversePrediction, provenance: dict[str, Any]) -> str:
    """HTML report of a PLS prediction: results with uncertainties, Q and T^2 against their limits."""
    head = "".join(f"<th>{_e(c)} ({_e(prediction.unit)})</th>" for c in prediction.components)
    rows = []
    for i, name in enumerate(prediction.names):
        cells = "".join(
            f"<td>{_num(prediction.concentration[i, j])} ± {_num(2 * prediction.std_uncertainty[i, j], '.2g')}"
            + (' <span class="flag">beyond-calibration</span>' if prediction.beyond_range[i, j] else "")
            + "</td>"
            for j in range(len(prediction.components))
        )
        verdict = '<span class="flag">outside-model</span>' if prediction.outside[i] else '<span class="ok">ok</span>'
        rows.append(
            f"<tr><td>{_e(name)}</td>{cells}<td>{_num(prediction.q_residual[i], '.3g')}</td>"
            f"<td>{_num(prediction.hotelling_t2[i], '.3g')}</td><td>{verdict}</td></tr>"
        )
    body = (
        f"<table><tr><th>scan</th>{head}<th>Q (limit {_num(prediction.q_limit, '.3g')})</th>"
        f"<th>T² (limit {_num(prediction.t2_limit, '.3g')})</th><th>flags</th></tr>{''.join(rows)}</table>"
        f"<p class='note'>± is twice the standard uncertainty ({_e(prediction.uncertainty_basis)}). "
        "outside-model: the scan is unlike the training scans (Q or T² beyond its limit); do not trust its values.</p>"
    )
    return "\n".join(
        [
            "<!DOCTYPE html>",
            '<html lang="en"><head><meta charset="utf-8"><meta name="viewport" content="width=device-width, initial-scale=1">',
            f"<title>PLS quantification</title><style>{_STYLE}</style></head><body>",
            "<h1>PLS quantification</h1><h2>Results</h2>",
            body,
            "<h2>Provenance</h2>",
            _provenance(provenance),
            "<h2>Cautions</h2>",
            f'<p class="caution">{_e(CAUTIONS)}</p>',
            "</body></html>",
        ]
    ) + "\n"
