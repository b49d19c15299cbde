"""What a person reads: the headline, the report page, the console, the example list and commands.

The end-to-end checks run every built-in example at a small size and compare the three places a
number is shown (console, summary.json, report.html): every number of the page's headline carries
the summary key it came from, and must equal the saved value and appear in the console output.
"""

from __future__ import annotations

import base64
import json
import re
import shutil
import subprocess
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest
from scipy.special import j0

from largeq.cli import main
from largeq.reports.headline import fmt, fmt_error, lookup, relax_headline
from largeq.scenario.examples import builtin_examples, examples_markdown

REPO = Path(__file__).resolve().parents[2]


# ------------------------------------------------------------------------------------------ formatting
def test_values_below_their_accuracy_print_as_zero():
    assert fmt(-1.1872e-17, 1e-9) == "0"
    assert fmt(8.1e-17, 1e-9) == "0"
    assert fmt(-0.31801579972785354, 1e-9, 5) == "-0.31802"
    assert fmt(float("nan")) == "n/a" and fmt(None) == "n/a"
    assert fmt(2.5e-10, digits=2) == "2.5e-10"  # without an accuracy a small number keeps its digits


def test_value_with_error_is_rounded_to_the_error_and_never_negative_zero():
    assert fmt_error(1.23456, 0.0123) == "1.235 ± 0.012"
    assert fmt_error(-0.02310892592978698, 0.012380085939799827) == "-0.023 ± 0.012"
    assert fmt_error(-3e-5, 0.012) == "0.000 ± 0.012"  # not "-0.000"
    assert fmt_error(0.5, None) == "0.5"


def test_headline_cells_point_at_the_numbers_they_print():
    summary = {
        "observables": {
            "a.b": {"equilibrium": 0.25, "equilibrium_err": 0.01, "settled": True, "relaxation_time": 3.0,
                    "temporal_variance": 1e-4, "diagonal_ensemble": 1e-17, "canonical": 0.2,
                    "microcanonical": 0.21, "measured_variance_over_bound": 0.5},
            "c": {"equilibrium": -0.3, "equilibrium_err": 0.02, "settled": False, "relaxation_time": float("nan"),
                  "temporal_variance": 4e-4},
        },
        "equilibration": {"d_eff": 59.17, "d_eff_range": [59.17, 59.17], "method": "exact diagonalization"},
        "matvecs": 535, "wall_seconds": 41.0, "memory_forecast_bytes": 2**30, "energy_drift": 1.5e-10,
        "norm_drift": 3e-11, "tolerance": 1e-10,
    }
    lines = relax_headline(summary)
    text = "\n".join(ln.text() for ln in lines)
    assert "nan" not in text and "-0.0" not in text and "e-17" not in text
    assert "diagonal ensemble 0;" in text
    assert "does NOT settle" in text and "after t" not in text.split("\n")[1]
    for ln in lines:
        for cell in ln.cells():
            if cell.value is not None:
                assert lookup(summary, cell.key) == cell.value
    assert lookup(summary, "observables[a.b].canonical") == 0.2


# ------------------------------------------------------------------------------------------ examples
def test_readme_lists_every_builtin_example():
    readme = (REPO / "README.md").read_text(encoding="utf-8")
    block = readme.split("<!-- examples: generated", 1)[1].split("-->\n", 1)[1].split("<!-- examples: end -->")[0]
    assert block == examples_markdown()
    for name in builtin_examples():
        assert f"`{name}`" in block
    # the README still opens with one paragraph and the two commands
    assert "python3 bootstrap.py demo" in readme.split("##")[0] and "python3 bootstrap.py test" in readme.split("##")[0]


def test_example_titles_say_what_the_quench_is():
    from largeq.scenario import load_scenario

    for name, path in builtin_examples().items():
        title = load_scenario(path).title
        assert "quenched into" in title, (name, title)
        assert not re.search(r"\bcell [A-Z]\b", title)


def test_examples_show_and_copy(tmp_path, capsys):
    assert main(["examples", "--show", "xx_neel"]) == 0
    shown = capsys.readouterr().out
    assert shown == builtin_examples()["xx_neel"].read_text(encoding="utf-8")
    dest = tmp_path / "mine.toml"
    assert main(["examples", "--copy", "neel_j1j2", str(dest)]) == 0
    assert dest.read_text(encoding="utf-8") == builtin_examples()["neel_j1j2"].read_text(encoding="utf-8")
    assert main(["examples", "--copy", "neel_j1j2", str(tmp_path)]) == 0
    assert (tmp_path / "neel_j1j2.toml").exists()
    capsys.readouterr()
    assert main(["examples", "--copy", "neel_j1j2", str(dest)]) == 2  # never overwrites
    assert "exists" in capsys.readouterr().err
    assert main(["examples", "--show", "nope"]) == 2


def test_xx_example_stops_before_its_revival_time():
    from largeq.scenario import load_scenario

    s = load_scenario(builtin_examples()["xx_neel"])
    J = s.couplings[0].x
    assert s.time.t_max <= s.n_sites / (4 * J)


def test_describe_does_not_contradict_itself(capsys):
    assert main(["describe", "xx_neel", "--sites", "12"]) == 0
    out = capsys.readouterr().out
    assert "not used yet" not in out
    assert "relax will evolve in symmetry sectors" in out
    assert "sectors for relax" in out.split("initial state:")[0]
    assert not re.search(r"\(dimension ([\d,]+), (real|complex)\): dimension", out)
    assert " Z = " not in out and " F = " not in out
    assert "spin flip +1" in out


def test_forecast_states_the_dimension_once(capsys):
    assert main(["forecast", "neel_j1j2", "--sites", "34"]) == 0
    out = capsys.readouterr().out
    basis_line = next(line for line in out.splitlines() if line.strip().startswith("basis:"))
    assert basis_line.count("2,333,606,220") == 2  # the label's C(34,17) = ..., and "instead of" in the reason
    assert "(dimension 2,333,606,220)" not in basis_line


# ------------------------------------------------------------------------------------------ report pages
class _Page(HTMLParser):
    """Images, headline cells and <pre> text of a report page."""

    def __init__(self):
        super().__init__()
        self.images, self.cells, self.pre, self.missing = [], [], [], 0
        self._span = None
        self._in_pre = False

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        if tag == "img":
            self.images.append(a.get("src", ""))
        elif tag == "span" and "data-key" in a:
            self._span = [a["data-key"], a.get("data-value"), ""]
        elif tag == "pre":
            self._in_pre = True
            self.pre.append("")
        elif tag == "p" and a.get("class") == "missing":
            self.missing += 1

    def handle_endtag(self, tag):
        if tag == "span" and self._span is not None:
            self.cells.append(tuple(self._span))
            self._span = None
        elif tag == "pre":
            self._in_pre = False

    def handle_data(self, data):
        if self._span is not None:
            self._span[2] += data
        if self._in_pre:
            self.pre[-1] += data


def _check_page(folder: Path, console: str) -> _Page:
    page_text = (folder / "report.html").read_text(encoding="utf-8")
    assert not re.search(r'(src|href)\s*=\s*"(https?:|//)', page_text)  # nothing fetched: opens offline
    page = _Page()
    page.feed(page_text)
    assert page.missing == 0
    assert len(page.images) >= 3
    for src in page.images:
        head, data = src.split(",", 1)
        assert head == "data:image/png;base64"
        assert base64.b64decode(data)[:8] == b"\x89PNG\r\n\x1a\n"
    summary = json.loads((folder / "summary.json").read_text())
    assert page.cells, "the page has no headline"
    for key, value, text in page.cells:
        saved = lookup(summary, key)
        if value is not None:
            assert float(value) == pytest.approx(saved, rel=1e-12, abs=0), key
        assert text in console, (key, text)
    assert (folder / "scenario.toml").read_text(encoding="utf-8") in page.pre
    return page


def _relax(tmp_path, name, sites, capsys, *extra):
    out = tmp_path / name
    rc = main(["relax", name, "--sites", str(sites), "--out", str(out), "--no-progress", *extra])
    assert rc == 0
    return out, capsys.readouterr().out


@pytest.mark.parametrize("name", sorted(builtin_examples()))
def test_console_summary_and_report_agree(tmp_path, capsys, name):
    out, console = _relax(tmp_path, name, 8, capsys)
    summary = json.loads((out / "summary.json").read_text())
    _check_page(out, console)
    assert "nan" not in console.lower().replace("nanos", "")
    assert not re.search(r"-0\.0+\b(?![1-9])", console), console  # no negative zero
    assert not re.search(r"e-1[5-9]", console)  # no rounding noise
    assert not re.search(r"holds only 10(\.0)? correlation times", json.dumps(summary))
    for n, o in summary["observables"].items():
        assert n in console
        assert ("settles at" in console) or ("does NOT settle" in console) or ("undecided" in console)
    text = (out / "report.html").read_text(encoding="utf-8")
    for piece in ("Conventions", "time grid", "seed: ", "version: numpy", "time: evolution", "S^"):
        assert piece in text, piece
    assert "⟨A⟩∞ (equilibrium)" not in text


def test_xx_report_draws_and_checks_the_free_fermion_curve(tmp_path, capsys):
    # <sigma^z_j(t)> = (-1)^j J0(2Jt) on the infinite chain: Flesch et al., Phys. Rev. A 78, 033608 (2008)
    out, console = _relax(tmp_path, "xx_neel", 16, capsys, "--equilibration", "off")
    summary = json.loads((out / "summary.json").read_text())
    from largeq.reports.store import read_results

    tree, _ = read_results(out / "results.h5", quantities=False)
    t = np.asarray(tree["curves"]["times"])
    mz = np.asarray(tree["curves"]["mz_0"])
    kc = summary["observables"]["mz_0"]["known_curve"]
    assert kc["valid_until"] == pytest.approx(16 / 4)
    early = t <= kc["valid_until"]
    dev = np.max(np.abs(mz[early] - j0(2 * t[early])))
    assert dev == pytest.approx(kc["max_deviation_until_valid"], rel=1e-9)
    assert dev < 1e-3  # L = 16 ring: finite-size corrections before t = L/4 are tiny
    assert "J0(2Jt)" in (out / "report.html").read_text(encoding="utf-8")


# ------------------------------------------------------------------------------------------ browser
def _browser():
    for name in ("chromium", "chromium-browser", "google-chrome", "chrome"):
        path = shutil.which(name)
        if path:
            return path
    return None


@pytest.mark.slow
@pytest.mark.skipif(_browser() is None, reason="no headless browser installed")
def test_report_renders_in_a_headless_browser(tmp_path, capsys):
    out, _ = _relax(tmp_path, "neel_j1j2", 8, capsys)
    png = tmp_path / "page.png"
    cmd = [_browser(), "--headless", "--no-sandbox", "--disable-gpu", "--hide-scrollbars",
           f"--screenshot={png}", "--window-size=1280,2400", (out / "report.html").as_uri()]
    subprocess.run(cmd, check=True, timeout=120, capture_output=True)
    data = png.read_bytes()
    assert data[:8] == b"\x89PNG\r\n\x1a\n" and len(data) > 50_000  # a page with plots, not a blank one


# ------------------------------------------------------------------------------------------ plot helpers
def test_known_curve_only_where_the_closed_form_holds():
    from largeq.analysis.references import known_curves
    from largeq.scenario import resolve_scenario

    xx = resolve_scenario("xx_neel", 12)
    curves = known_curves(xx, {"mz_0": 1.0, "stag_mz": 1.0})
    assert set(curves) == {"mz_0", "stag_mz"} and curves["mz_0"].valid_until == pytest.approx(3.0)
    t = np.linspace(0, 3, 7)
    np.testing.assert_allclose(curves["mz_0"].value(t), j0(2 * t))  # (-1)^0 J0(2Jt), J = 1
    assert known_curves(resolve_scenario("neel_j1j2", 8), {"mz_0": 1.0}) == {}  # interacting: no closed form
    assert known_curves(resolve_scenario("ising_tilted", 8), {"mz_avg": 0.5}) == {}


def test_titles_break_at_natural_places_and_identical_curves_merge():
    from largeq.reports.plots import _same_curves, _wrap

    title = "Tilted spins quenched into a mixed-field Ising chain (g = -1.05, h = 0.5) (L = 10)"
    wrapped = _wrap(title, 72)
    assert wrapped.replace("\n", " ") == title and all(len(x) <= 72 for x in wrapped.split("\n"))
    assert "h =\n" not in wrapped
    a = np.linspace(0, 1, 50)
    assert _same_curves({"stag_mz": a, "mz_0": a.copy(), "zz": a + 1}) == [["stag_mz", "mz_0"], ["zz"]]
