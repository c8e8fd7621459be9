"""``shadow report``: the validation measures, the page's content, and how it looks in a real browser."""

from __future__ import annotations

import dataclasses
import datetime as dt
import re
import shutil
import subprocess
from pathlib import Path

import numpy as np
import pytest
from numpy.testing import assert_allclose
from scipy import stats

from shadow.analysis import FinalEstimate, analyse
from shadow.analysis.recording import Recording
from shadow.analysis.report import build_report, html_to_pdf, validation_measures, validation_stretch
from shadow.api.schemas import ADVISORY_NOTICE
from shadow.ingest.wire import encode_json
from shadow.monitoring import RobotMonitor, default_settings
from tests.analysis.test_analyze_cli import (  # noqa: F401  (sim_recording is a fixture)
    ROBOT,
    START_TOLERANCE_S,
    delta_description,
    shadow_cli,
    sim_recording,
)
from tests.synthetic import EXAMPLE_DELTA, SyntheticStream, delta_stream

EVENT_HEADING = re.compile(r"Event \d+: collision at (\d{4}-\d\d-\d\dT\d\d:\d\d:\d\d\.\d{3}Z)")


def _analysed(stream: SyntheticStream, *, lag: bool = True) -> tuple[RobotMonitor, object]:
    batches = stream.batches(ROBOT, 10)
    rec = Recording(Path("synthetic.jsonl"), "jsonl", ROBOT, tuple(batches), tuple(range(1, len(batches) + 1)))
    settings = default_settings(stream.description)
    if not lag:  # tests/synthetic.py's efforts belong to the motion at their own instants (no loop, no hold)
        tracker = dataclasses.replace(settings.tracker, current_loop_bandwidth_hz=None, command_period_s=None)
        settings = dataclasses.replace(settings, tracker=tracker)
    monitor = RobotMonitor(ROBOT, stream.description, None, settings)
    return monitor, analyse(rec, monitor)


@pytest.mark.parametrize("n_samples", [3, 6, 500])
def test_validation_measures_match_their_definitions(rng: np.random.Generator, n_samples: int) -> None:
    measured = rng.normal(size=(n_samples, 4)) * [1.0, 5.0, 0.1, 20.0]
    computed = measured + rng.normal(scale=0.3, size=measured.shape)
    rms, nrms, r = validation_measures(measured, computed)
    assert rms.shape == nrms.shape == r.shape == (4,)
    for j in range(4):
        e = measured[:, j] - computed[:, j]
        expected_rms = np.sqrt(np.mean(e**2))  # root mean square, by definition
        assert_allclose(rms[j], expected_rms, rtol=1e-12)
        assert_allclose(nrms[j], 100 * expected_rms / (measured[:, j].max() - measured[:, j].min()), rtol=1e-12)
        # reference: scipy's Pearson correlation coefficient
        assert_allclose(r[j], stats.pearsonr(measured[:, j], computed[:, j]).statistic, rtol=1e-10, atol=1e-12)


def test_validation_with_the_true_parameters_leaves_only_the_noise(rng: np.random.Generator) -> None:
    stream = delta_stream(rng, duration_s=8.0)
    monitor, analysis = _analysed(stream, lag=False)
    tool = stream.description.tool
    truth = [tool.tool_mass_kg, tool.work_piece_mass_kg, *stream.friction]  # type: ignore[union-attr]
    finals = [FinalEstimate(name, v, 0.0, True, 0.0) for name, v in zip(monitor.tracker.parameter_names, truth,
                                                                         strict=True)]  # fmt: skip
    v = validation_stretch(monitor, analysis, finals, stretch_s=4.0)
    assert v is not None and v.measured.shape == v.computed.shape == (v.t.shape[0], 3)
    sigma = 0.005 * np.array([d.rated_effort for d in stream.description.parameters.drives])
    # measured = model + white Gaussian noise of std sigma: the RMS error estimates sigma, with a relative
    # standard error of 1/sqrt(2 K) (chi distribution), about 1 % for K = 4000: 6 % is more than 5 of them
    assert_allclose(v.rms, sigma, rtol=0.06)
    # correlation of a signal with itself plus independent noise: r = s_c / sqrt(s_c^2 + sigma^2)
    s_c = v.computed.std(axis=0)
    assert_allclose(v.correlation, s_c / np.sqrt(s_c**2 + sigma**2), rtol=2e-3)


def test_wrong_friction_shows_in_the_validation(rng: np.random.Generator) -> None:
    stream = delta_stream(rng, duration_s=6.0)
    monitor, analysis = _analysed(stream, lag=False)
    tool = stream.description.tool
    wrong = [tool.tool_mass_kg, tool.work_piece_mass_kg, *(np.asarray(stream.friction) * 3.0)]  # type: ignore[union-attr]
    finals = [FinalEstimate(name, v, 0.0, True, 0.0) for name, v in zip(monitor.tracker.parameter_names, wrong,
                                                                         strict=True)]  # fmt: skip
    v = validation_stretch(monitor, analysis, finals)
    sigma = 0.005 * np.array([d.rated_effort for d in stream.description.parameters.drives])
    assert (v.rms > 2 * sigma).all()  # Coulomb 1.5 -> 4.5 N m cannot hide in 0.36 N m of noise


def _iso(t: float) -> str:
    return dt.datetime.fromtimestamp(t, tz=dt.UTC).isoformat(timespec="milliseconds").replace("+00:00", "Z")


def test_report_holds_events_caution_and_no_outside_resource(rng: np.random.Generator) -> None:
    stream = delta_stream(rng, duration_s=7.0, impact_at_s=2.4)
    monitor, analysis = _analysed(stream)
    page = build_report(monitor, analysis)
    assert page.index(ADVISORY_NOTICE) < page.index("<h1>")  # the caution comes first
    found = EVENT_HEADING.findall(page)
    assert len(found) == 1
    t_found = dt.datetime.fromisoformat(found[0].replace("Z", "+00:00")).timestamp()
    assert abs(t_found - (stream.t[0] + 2.4)) <= START_TOLERANCE_S  # the pulse of tests/synthetic.py
    assert not re.search(r"(?i)(https?:|ftp:|//[a-z0-9.-]+\.[a-z]{2,})", page)
    sources = re.findall(r'(?:src|href)="([^"]*)"', page)
    assert sources and all(s.startswith("data:image/png;base64,") for s in sources)
    for section in ("Health", "Model validation", "Payload and friction trends", "Events (1)"):
        assert section in page
    assert "platform at (" in page and "correlation r" in page


@pytest.mark.slow
def test_report_of_the_simulator_run_lists_every_impact(
    sim_recording: tuple[Path, list[float]],  # noqa: F811
    tmp_path: Path,
) -> None:
    path, impacts = sim_recording
    out = tmp_path / "report.html"
    assert shadow_cli(["report", str(delta_description()), str(path), "-o", str(out)]) == 0
    page = out.read_text(encoding="utf-8")
    times = np.array(
        [dt.datetime.fromisoformat(s.replace("Z", "+00:00")).timestamp() for s in EVENT_HEADING.findall(page)]
    )
    for t_impact in impacts:  # ground truth of the simulator
        assert np.min(np.abs(times - t_impact)) <= START_TOLERANCE_S + 0.001  # ISO text keeps milliseconds
    assert (
        ADVISORY_NOTICE in page and "http://" not in page and "https://" not in page
    )  # no link out (base64 may spell "http")


def chromium() -> str:
    found = shutil.which("chromium") or shutil.which("chromium-browser")
    if found is None:
        pytest.fail("chromium is not installed; run: apt-get update && apt-get install -y chromium")
    return found


def run_tool(name: str, *args: str) -> str:
    """Run one of poppler's tools (Debian's poppler-utils, installed by tests/run) and return its output."""
    found = shutil.which(name)
    if found is None:
        pytest.fail(f"{name} is not installed; run: apt-get update && apt-get install -y poppler-utils")
    return subprocess.run([found, *args], check=True, capture_output=True, text=True, timeout=120).stdout


@pytest.mark.browser
def test_report_renders_in_headless_chromium(tmp_path: Path, rng: np.random.Generator) -> None:
    stream = delta_stream(rng, duration_s=6.0, impact_at_s=2.4)
    recording = tmp_path / "run.jsonl"
    recording.write_bytes(b"".join(encode_json(b) + b"\n" for b in stream.batches(ROBOT, 10)))
    page = tmp_path / "report.html"
    assert shadow_cli(["report", EXAMPLE_DELTA, str(recording), "-o", str(page), "--pdf"]) == 0
    pdf = page.with_suffix(".pdf")
    assert pdf.read_bytes().startswith(b"%PDF-")
    # the PDF rasterised by poppler's pdftoppm (an outside renderer): the pages carry the caution and the plots
    pages = int(re.search(r"Pages:\s+(\d+)", run_tool("pdfinfo", str(pdf))).group(1))  # type: ignore[union-attr]
    assert pages >= 2
    run_tool("pdftoppm", "-png", "-r", "40", "-f", "1", "-l", str(pages), str(pdf), str(tmp_path / "pdfpage"))
    from PIL import Image  # matplotlib depends on pillow

    rasters = [np.asarray(Image.open(f).convert("RGB"), dtype=float) for f in sorted(tmp_path.glob("pdfpage*.png"))]
    assert len(rasters) == pages
    assert (np.abs(rasters[0].reshape(-1, 3) - [255, 247, 230]).max(axis=1) < 8).mean() > 0.005  # caution fill
    assert max(len(np.unique(r.reshape(-1, 3), axis=0)) for r in rasters) > 200  # drawn plots, not blank pages
    shot = tmp_path / "report.png"
    flags = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
             "--disable-component-update", "--disable-sync", "--no-first-run", "--disable-dev-shm-usage",
             f"--user-data-dir={tmp_path / 'profile'}", "--window-size=1100,3000", "--hide-scrollbars"]  # fmt: skip
    subprocess.run([chromium(), *flags, f"--screenshot={shot}", page.as_uri()], check=True, capture_output=True,
                   timeout=120)  # fmt: skip

    image = np.asarray(Image.open(shot).convert("RGB"), dtype=float)
    assert image.shape[:2] == (3000, 1100)
    # the caution box's amber fill (#fff7e6) near the top, and drawn plots (many distinct colours) below it
    top = image[:200].reshape(-1, 3)
    assert (np.abs(top - [255, 247, 230]).max(axis=1) < 4).mean() > 0.05
    assert len(np.unique(image[600:].reshape(-1, 3), axis=0)) > 200


@pytest.mark.browser
def test_pdf_of_a_minimal_page(tmp_path: Path) -> None:
    page = tmp_path / "tiny.html"
    page.write_text("<!doctype html><title>t</title><p>caution</p>")
    html_to_pdf(page, tmp_path / "tiny.pdf")
    assert (tmp_path / "tiny.pdf").read_bytes().startswith(b"%PDF-")
