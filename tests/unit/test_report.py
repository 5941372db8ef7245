"""The HTML report and the terminal views: well-formed, escaped, self-contained, complete; progress and --json."""

from __future__ import annotations

import io
import json
import re
import time
import xml.etree.ElementTree as ET
from dataclasses import replace
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest

from absolve.cli import main
from absolve.demo_data import DEMO_UNIT, DemoFiles
from absolve.inverse import InversePrediction
from absolve.io.library_file import read_library
from absolve.io.tables import read_scans
from absolve.library import ReferenceLibrary
from absolve.quantify import FLAG_TEXT, MixtureResult, quantify
from absolve.render import ProgressLine
from absolve.spectra import Spectra
from absolve.report.figures import render_figures
from absolve.report.html import CAUTIONS, TABLE_ROWS, build_model_report, build_report, comparison_section, plan_section

HOSTILE = "<script>alert(1)</script>"
HOSTILE_COMPONENT = '<img src=x onerror="alert(2)">&amp;'
HOSTILE_FILE = "a'b\"<c>&.csv"
VOID = {"meta", "br", "img", "hr", "input", "link", "col", "area", "base", "wbr", "source", "track", "embed", "param"}


@pytest.fixture(scope="module")
def library_file(tmp_path_factory: pytest.TempPathFactory, demo: DemoFiles) -> Path:
    """The demo's library, calibrated from its standards by the command line."""
    path = tmp_path_factory.mktemp("library") / "library.json"
    command = ["calibrate", str(demo.standards), "--standards", str(demo.standards_concentrations), "--unit", DEMO_UNIT, "--out", str(path)]
    assert main(command) == 0
    return path


@pytest.fixture(scope="module")
def demo_run(demo: DemoFiles, library_file: Path) -> tuple[MixtureResult, ReferenceLibrary]:
    """The demo's bath samples quantified; the library's record names a hostile standards file."""
    library = replace(read_library(library_file), provenance={"inputs": [{"file": HOSTILE_FILE, "sha256": "0" * 64}]})
    return quantify(read_scans([demo.bath_samples]), library), library


def _provenance(*files: str) -> dict[str, object]:
    return {
        "tool": "absolve", "version": "9.9", "python": "3.x", "created": "2026-01-01T00:00:00+00:00",
        "inputs": [{"file": name, "sha256": f"{k:064x}"} for k, name in enumerate(files)],
        "options": {"baseline": "offset", "range": [None, 700.0], "note": HOSTILE},
    }


class _Balance(HTMLParser):
    """Start and end tags as a browser's tokenizer sees them; records every mismatch."""

    def __init__(self) -> None:
        super().__init__(convert_charrefs=True)
        self.stack: list[str] = []
        self.problems: list[str] = []
        self.tags: list[tuple[str, dict[str, str | None]]] = []

    def handle_starttag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        self.tags.append((tag, dict(attrs)))
        if tag not in VOID:
            self.stack.append(tag)

    def handle_startendtag(self, tag: str, attrs: list[tuple[str, str | None]]) -> None:
        self.tags.append((tag, dict(attrs)))

    def handle_endtag(self, tag: str) -> None:
        if not self.stack or self.stack[-1] != tag:
            self.problems.append(f"</{tag}> closes {self.stack[-1:]}")
        else:
            self.stack.pop()


def _check_well_formed(page: str) -> ET.Element:
    parser = _Balance()
    parser.feed(page)
    parser.close()
    assert parser.problems == [] and parser.stack == [], (parser.problems[:5], parser.stack)
    # The page is also well-formed XML (XHTML-compatible), which a strict parser proves.
    return ET.fromstring(page)


@pytest.fixture(scope="module")
def demo_page(demo_run: tuple[MixtureResult, ReferenceLibrary]) -> str:
    result, library = demo_run
    figures = render_figures(result, library, detail=2)
    return build_report(result, library, _provenance("bath_samples.csv", "library.json"), figures=figures)


def test_demo_report_is_well_formed_and_has_every_section(demo_page: str, demo_run: tuple[MixtureResult, ReferenceLibrary]) -> None:
    result, _ = demo_run
    root = _check_well_formed(demo_page)
    headings = [h.text for h in root.iter("h2")]
    assert headings == [
        "What was asked and how it was answered", "The batch at a glance", "Results", "Fits of individual scans",
        "Interferent screen", "Conditioning and selectivity", "Uncertainty budget", "Provenance", "Cautions",
    ]
    text = "".join(root.itertext())
    assert CAUTIONS in text
    # Every flag that occurs is explained in plain words.
    used = {f for scan in result.scan_flags for f in scan} | {f for scan in result.flags for per in scan for f in per}
    assert used and all(FLAG_TEXT[flag] in text for flag in used)
    # Figures: library, two batch figures, the first two scans and two flagged ones; every table link resolves.
    figures = [f.get("id") for f in root.iter("figure")]
    assert len(figures) == 7 and len(set(figures)) == 7
    links = {a.get("href") for a in root.iter("a")}
    anchors = {e.get("id") for e in root.iter() if e.get("id")}
    assert links and {link[1:] for link in links} <= anchors


def test_report_is_self_contained(demo_page: str) -> None:
    parser = _Balance()
    parser.feed(demo_page)
    for tag, attrs in parser.tags:
        assert tag not in ("script", "link", "iframe", "object", "embed"), tag
        for name, value in attrs.items():
            if name in ("src", "href", "xlink:href") and value is not None:
                assert value.startswith(("#", "data:image/")), (tag, name, value[:40])
    # The only absolute URLs are SVG namespace names, which are identifiers, never fetched.
    assert set(re.findall(r"https?://[^\s\"'<>]+", demo_page)) == {"http://www.w3.org/2000/svg"}
    assert all(m.group(0).startswith('xmlns="') for m in re.finditer(r'\S+="http://www\.w3\.org/2000/svg"', demo_page))
    assert "default-src 'none'" in demo_page


def test_every_user_string_is_escaped(demo_run: tuple[MixtureResult, ReferenceLibrary]) -> None:
    result, library = demo_run
    names = (HOSTILE, *result.scan_names[1:])
    hostile_library = replace(
        library,
        components=(replace(library.components[0], name=HOSTILE_COMPONENT, warnings=("<b>bold</b> warning",)), *library.components[1:]),
    )
    hostile = replace(result, scan_names=names, components=hostile_library.names)
    figures = render_figures(hostile, hostile_library, detail=1)
    page = build_report(
        hostile, hostile_library, _provenance(HOSTILE_FILE), figures=figures,
        sections=[plan_section(_FakePlan(f"plan for {HOSTILE}"))], title=f"Batch {HOSTILE}",
    )
    root = _check_well_formed(page)
    for raw in (HOSTILE, HOSTILE_COMPONENT, "<b>bold</b>", "<c>"):
        assert raw not in page
    assert not list(root.iter("script")) and not list(root.iter("img")) and all(b.text != "bold" for b in root.iter("b"))
    text = "".join(root.itertext())
    # The user's strings arrive as text, character for character.
    for raw in (HOSTILE, HOSTILE_COMPONENT, HOSTILE_FILE, "<b>bold</b> warning", f"plan for {HOSTILE}", f"Batch {HOSTILE}"):
        assert raw in text, raw


class _FakePlan:
    """Anything with report() can fill the plan section."""

    def __init__(self, text: str) -> None:
        self.text = text

    def report(self) -> str:
        return self.text


def test_extra_sections_go_before_the_provenance(demo_run: tuple[MixtureResult, ReferenceLibrary]) -> None:
    result, library = demo_run
    page = build_report(result, library, _provenance("x.csv"), sections=[plan_section(_FakePlan("430 nm\n520 nm"), "<svg></svg>")])
    root = _check_well_formed(page)
    headings = [h.text for h in root.iter("h2")]
    assert headings.index("Wavelength plan") == headings.index("Provenance") - 1
    assert "430 nm\n520 nm" in page and "No scan figures were drawn" in page


def test_long_tables_stop_with_a_note_and_the_batch_stays_small(demo_run: tuple[MixtureResult, ReferenceLibrary]) -> None:
    result, library = demo_run
    n = TABLE_ROWS + 123
    rows = np.arange(n) % result.n_scans
    arrays = {
        name: getattr(result, name)[rows]
        for name in ("concentration", "std_uncertainty", "expanded_uncertainty", "coverage_factor", "upper_limit", "lod", "loq",
                     "sensitivity", "selectivity", "variance_inflation", "baseline", "fitted", "residuals", "used", "rms_residual",
                     "condition_number", "residual_dof", "noise_scale", "residual_p_value", "interferent")
    }
    screening = replace(
        result.screening, p_value=result.screening.p_value[rows], flagged=result.screening.flagged[rows],
        diagnoses=tuple(result.screening.diagnoses[i] for i in rows), statistic=result.screening.statistic[rows],
    )
    big = replace(
        result, scan_names=tuple(f"scan-{i}" for i in range(n)), screening=screening,
        budget={k: v[rows] for k, v in result.budget.items()}, excluded={k: v[rows] for k, v in result.excluded.items()},
        flags=tuple(result.flags[i] for i in rows), scan_flags=tuple(result.scan_flags[i] for i in rows), **arrays,
    )
    page = build_report(big, library, _provenance("big.csv"), figures=render_figures(big, library, detail=1))
    root = _check_well_formed(page)
    assert f"Showing the first {TABLE_ROWS} of {n} scans; all of them are in results.csv." in page
    assert f"Showing the first {TABLE_ROWS} of {n} scans; all of them are in fit.csv." in page
    results_table = root.find(".//section[@id='results']//tbody")
    assert results_table is not None and len(results_table) == TABLE_ROWS
    # Six figures (library, batch, one first scan, one flagged) and the truncated tables: well under 2 MB.
    assert len(page.encode("utf-8")) < 2_000_000


def test_budget_shares_are_the_variance_shares_of_each_source(demo_run: tuple[MixtureResult, ReferenceLibrary]) -> None:
    result, library = demo_run
    # The first demo scan as a batch of its own (rebuilt from its fit and residual), with path and dilution tolerances.
    scan = Spectra(result.wavelengths, (result.fitted + result.residuals)[:1], result.scan_names[:1])
    one = quantify(scan, library, path_length_tolerance=0.01, dilution_tolerance=0.005)
    page = build_report(one, library, _provenance("x.csv"))
    root = _check_well_formed(page)
    body = root.find(".//section[@id='budget']//tbody")
    assert body is not None
    for j, row in enumerate(body):
        cells = ["".join(td.itertext()) for td in row]
        u = one.std_uncertainty[0, j]
        # GUM 5.1.2: for uncorrelated inputs the combined variance is the sum of the squared contributions.
        shares = [100 * (one.budget[key][0, j] / u) ** 2 for key in ("spectral_noise", "absorptivity", "path_length", "dilution")]
        assert sum(shares) == pytest.approx(100.0, rel=1e-9)
        assert cells[2:6] == [f"{share:.1f} %" for share in shares]


def test_comparison_with_pls_gives_the_normalised_difference(demo_run: tuple[MixtureResult, ReferenceLibrary]) -> None:
    result, library = demo_run
    n, m = result.n_scans, len(result.components)
    pls = result.concentration.copy()
    pls[0, 0] += 10 * result.expanded_uncertainty[0, 0]
    prediction = InversePrediction(
        names=result.scan_names, components=result.components, unit=result.unit, concentration=pls,
        std_uncertainty=result.expanded_uncertainty / 2, leverage=np.zeros((n, m)), q_residual=np.zeros(n), q_limit=1.0,
        hotelling_t2=np.zeros(n), t2_limit=1.0, outside=np.zeros(n, dtype=bool), beyond_range=np.zeros((n, m), dtype=bool),
        complete=np.ones(n, dtype=bool), latent_variables=(2,) * m, alpha=0.05,
    )
    heading, fragment = comparison_section(result, prediction)
    root = ET.fromstring(f"<div>{fragment}</div>")
    rows = root.findall(".//tbody/tr")
    assert len(rows) == n * m
    first = ["".join(td.itertext()) for td in rows[0]]
    # (a - b) / sqrt(Ua^2 + Ub^2) with Ua = Ub: -10 / sqrt(2).
    assert first[-1] == f"{-10 / np.sqrt(2):.2f}" and rows[0].get("class") == "flagged"
    assert all(["".join(td.itertext()) for td in row][-1] == "0.00" for row in rows[1:])
    page = build_report(result, library, _provenance("x.csv"), prediction=prediction)
    assert heading in [h.text for h in _check_well_formed(page).iter("h2")]
    model_page = build_model_report(prediction, _provenance(HOSTILE_FILE))
    assert HOSTILE_FILE in "".join(_check_well_formed(model_page).itertext())


# --------------------------------------------------------------------------- terminal


class _Terminal(io.StringIO):
    def isatty(self) -> bool:
        return True


class _Clock:
    def __init__(self) -> None:
        self.now = 100.0

    def __call__(self) -> float:
        return self.now


def test_progress_line_waits_then_redraws_in_place_and_clears() -> None:
    stream, clock = _Terminal(), _Clock()
    with ProgressLine(stream, delay=2.0, interval=60.0, clock=clock) as progress:
        progress("fitting 10 scans")
        assert stream.getvalue() == ""  # short runs stay clean
        clock.now += 2.5
        progress("drawing figures", 3, 12)
        assert stream.getvalue().endswith("\r\x1b[Kabsolve: drawing figures 3/12 (2 s)")
        drawn = stream.getvalue()
        progress("drawing figures", 3, 12)
        assert stream.getvalue() == drawn  # an unchanged line is not redrawn
    assert stream.getvalue().endswith("\r\x1b[K")


def test_progress_line_keeps_time_moving_during_a_long_step() -> None:
    stream, clock = _Terminal(), _Clock()
    with ProgressLine(stream, delay=0.0, interval=0.01, clock=clock) as progress:
        progress("fitting 10000 scans")
        clock.now += 7.0
        for _ in range(500):  # the ticker thread redraws without being called
            if "(7 s)" in stream.getvalue():
                break
            time.sleep(0.01)
    assert "absolve: fitting 10000 scans (7 s)" in stream.getvalue()


@pytest.mark.parametrize("quiet, tty", [(True, True), (False, False)])
def test_progress_line_is_silent_when_quiet_or_not_a_terminal(quiet: bool, tty: bool) -> None:
    stream, clock = (_Terminal() if tty else io.StringIO()), _Clock()
    with ProgressLine(stream, quiet=quiet, delay=0.0, clock=clock) as progress:
        clock.now += 5
        progress("writing files")
    assert stream.getvalue() == "" and not progress.enabled


def test_quantify_json_prints_only_json_and_figures_are_saved(
    tmp_path: Path, demo: DemoFiles, library_file: Path, capsys: pytest.CaptureFixture[str]
) -> None:
    out = tmp_path / "run"
    code = main(["quantify", str(demo.bath_samples), "--library", str(library_file), "--out", str(out), "--json",
                 "--figures", "svg", "--detail", "1"])
    captured = capsys.readouterr()
    assert code == 0, captured.err
    document = json.loads(captured.out)  # the whole of stdout is one JSON document
    assert [scan["scan"] for scan in document["scans"]][:2] == ["bath-01-start", "bath-02-20min"]
    assert captured.err == ""  # not a terminal: no progress line
    saved = sorted(path.name for path in (out / "figures").iterdir())
    assert saved[:3] == ["library.svg", "overview.svg", "residual-sizes.svg"]
    assert "scan-00001-bath-01-start.svg" in saved and len(saved) == 5
    page = (out / "report.html").read_text(encoding="utf-8")
    assert page.count("<figure") == 5


@pytest.mark.parametrize(
    "option, message",
    [(["--figures", "gif"], "--figures must be one of png, svg"), (["--detail", "-1"], "--detail must be 0 or more")],
)
def test_quantify_refuses_bad_report_options(
    tmp_path: Path, demo: DemoFiles, library_file: Path, capsys: pytest.CaptureFixture[str], option: list[str], message: str
) -> None:
    code = main(["quantify", str(demo.bath_samples), "--library", str(library_file), "--out", str(tmp_path / "o"), *option])
    err = capsys.readouterr().err.strip().splitlines()
    assert code == 2 and len(err) == 1 and err[0].startswith("error: ") and message in err[0]
    assert not (tmp_path / "o").exists()
