"""The HTML report: self-contained, escaped, and showing what the store and the lot job hold.

Every store here is made by the real lot pipeline (``process_lot`` + ``analyse_lot``) on
Touchstone files written with scikit-rf from the seeded antenna model of
sample_measurements/make_samples.py (invented 915 MHz units), some detuned so that they
fail the shared network, one with a hostile name, and one cut short.
"""

from __future__ import annotations

import base64
import io
import json
import subprocess
import sys
from dataclasses import replace
from html import escape
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest

from sample_data import sample_generator

from pipeline.cli import main
from pipeline.elements import Element, PartModel
from pipeline.headroom import analyse_band, summarise_lot
from pipeline.lotjob import analyse_lot, process_lot
from pipeline.process import Settings
from pipeline.report import load_lot, load_unit, plotted_units, write_report
from pipeline.store import ResultsStore

ROOT = Path(__file__).resolve().parents[1]
BAND = (902e6, 928e6)
SPEC_DB = 10.0
HOSTILE_UNIT = """<img src=x onerror=alert(1)>&"'"""
HOSTILE_BROKEN = "<b onmouseover=alert(2)>broken"
HOSTILE_LOT = 'lot <script>alert("3")</script> & co'
DETUNED = {"U-0004": 0.94, "U-0009": 1.055}      # resonance scale: these miss the shared match


# --------------------------------------------------------------------------- test lots

def write_lot(folder: Path, names: list[str], seed: int = 11, detuned: dict | None = None,
              points: int = 401) -> list[str]:
    """One .s1p per name: the Larkspur model with unit-to-unit spread, noise, and the
    given resonance scales for detuned units."""
    ms = sample_generator()
    rng = np.random.default_rng(seed)
    freq = ms.frequency(700e6, 1.1e9, points)
    paths = []
    for name in names:
        scale = (detuned or {}).get(name, 1 + rng.normal(0, 0.004))
        unit = replace(ms.LARKSPUR, fs_hz=ms.LARKSPUR.fs_hz * scale,
                       r_rad_ohm=ms.LARKSPUR.r_rad_ohm * (1 + rng.normal(0, 0.03)))
        s11 = ms.reflection(unit.impedance(freq.f)) + ms.noise(rng, freq.npoints)
        network = ms.one_port(freq, s11, f"invented test unit {name} <script>alert(4)</script>")
        paths.append(str(ms.write(network, folder / f"{name}.s1p")))
    return paths


def write_broken(folder: Path, name: str) -> str:
    """A Touchstone file cut short in its last row (an interrupted transfer)."""
    path = folder / f"{name}.s1p"
    path.write_text(f"! {name}\n# Hz S RI R 50\n900000000 0.1 0.2\n901000000 0.1\n")
    return str(path)


def build_store(folder: Path, lot: str, names: list[str], *, analyse: bool = True,
                broken: str | None = None, mc_trials: int = 400) -> Path:
    """Run the real lot pipeline on a generated lot; the store's path."""
    files = folder / "files"
    files.mkdir(parents=True)
    paths = write_lot(files, names, detuned=DETUNED)
    if broken:
        paths.append(write_broken(files, broken))
    settings = Settings(band_hz=BAND, spec_rl_db=SPEC_DB, series="E24", lot=lot)
    store_path = folder / "results.h5"
    with ResultsStore(store_path, mode="a") as store:
        process_lot(store, paths, settings, workers=1)
        if analyse:
            analyse_lot(store, lot, settings, mc_trials=mc_trials, seed=1)
    return store_path


NAMES = [f"U-{i:04d}" for i in range(1, 11)] + [HOSTILE_UNIT]


@pytest.fixture(scope="module")
def lot_store(tmp_path_factory) -> Path:
    return build_store(tmp_path_factory.mktemp("lot"), HOSTILE_LOT, NAMES, broken=HOSTILE_BROKEN)


@pytest.fixture(scope="module")
def lot_html(lot_store, tmp_path_factory) -> tuple[Path, str]:
    path = write_report(lot_store, tmp_path_factory.mktemp("out"), unit_plots=4)
    return path, path.read_text(encoding="utf-8")


# --------------------------------------------------------------------------- HTML reading

class Page(HTMLParser):
    """Every start tag with its attributes, the text, and the table rows of the units."""

    def __init__(self, text: str):
        super().__init__(convert_charrefs=True)
        self.tags: list[tuple[str, dict]] = []
        self.text: list[str] = []
        self.feed(text)

    def handle_starttag(self, tag, attrs):
        self.tags.append((tag, dict(attrs)))

    def handle_data(self, data):
        self.text.append(data)

    def all(self, tag: str) -> list[dict]:
        return [attrs for t, attrs in self.tags if t == tag]


ALLOWED_TAGS = {"html", "head", "meta", "title", "style", "body", "header", "main", "section",
                "div", "p", "span", "b", "small", "h1", "h2", "h3", "table", "thead", "tbody",
                "tr", "th", "td", "a", "figure", "figcaption", "img", "code", "dl", "dt", "dd",
                "article", "footer", "br"}


def png_of(uri: str):
    from PIL import Image

    prefix = "data:image/png;base64,"
    assert uri.startswith(prefix)
    return Image.open(io.BytesIO(base64.b64decode(uri[len(prefix):], validate=True)))


def unit_rows(html_text: str) -> list[tuple[str, str]]:
    """(unit name, status) of each row of the units table, in page order."""
    section = html_text.split('<section id="units">', 1)[1].split("</section>", 1)[0]
    rows = []
    for row in section.split("<tr class=")[1:]:
        cells = Page(row.split(">", 1)[1])
        texts = [t for t in cells.text if t.strip()]
        rows.append((texts[0], texts[1]))
    return rows


# --------------------------------------------------------------------------- tests: safety

def test_report_is_one_self_contained_file(lot_html):
    path, text = lot_html
    page = Page(text)
    assert [p.name for p in path.parent.iterdir()] == [path.name]        # no side files
    assert {tag for tag, _ in page.tags} <= ALLOWED_TAGS                   # no script, link, iframe...
    images = page.all("img")
    assert len(images) == 4 + 4                      # histogram, Smith, curves, headroom + 4 units
    for attrs in images:
        picture = png_of(attrs["src"])
        assert picture.size == (int(attrs["width"]), int(attrs["height"]))
        assert attrs["alt"]
    lowered = text.lower()
    for fetchable in ("http:", "https:", "ftp:", "file:", "url(", "@import", "<link", "<script",
                      "<iframe", "<object"):
        assert fetchable not in lowered
    csp = next(a["content"] for a in page.all("meta") if a.get("http-equiv") == "Content-Security-Policy")
    assert "default-src 'none'" in csp and "img-src data:" in csp


def test_every_string_from_the_inputs_is_escaped(lot_html, lot_store):
    path, text = lot_html
    page = Page(text)
    for attrs in (a for _, a in page.tags):
        assert not any(name.startswith("on") for name in attrs), attrs        # no injected handler
    for hostile in (HOSTILE_UNIT, HOSTILE_BROKEN, HOSTILE_LOT):
        assert hostile not in text
        assert escape(hostile) in text
    visible = "".join(page.text)
    assert HOSTILE_UNIT in visible and HOSTILE_LOT in visible and HOSTILE_BROKEN in visible
    assert "<script>alert(4)" not in text                 # Touchstone comments never reach the page
    assert path.name == "lot__script_alert__3____script____co.html"


def test_report_file_name_stays_in_the_output_folder(tmp_path):
    store = build_store(tmp_path / "a", "../../etc/passwd", ["U-0001", "U-0002"], mc_trials=100)
    path = write_report(store, tmp_path / "out")
    assert path.parent == tmp_path / "out" and path.name == "_.._etc_passwd.html"


# --------------------------------------------------------------------------- tests: content

def test_key_numbers_are_those_of_the_lot_summary(lot_html, lot_store):
    _, text = lot_html
    with ResultsStore(lot_store, mode="r") as store:
        summary = store.get_lot(HOSTILE_LOT)
    shared = summary["shared"]
    assert summary["n_units"] == len(NAMES) and summary["n_failed_files"] == 1
    assert sorted(shared["failing_unit_ids"]) == sorted(DETUNED)
    yield_after = f"{100 * shared['yield_fraction']:.1f} %"
    assert f'<span class="from">0 %</span><span class="arrow">→</span>' in text
    assert yield_after in text
    assert f"{shared['n_pass']} of {len(NAMES)} units" in text
    assert f"{100 * summary['tolerance']['yield_fraction']:.1f} %" in text
    for element in (Element.from_dict(d) for d in shared["elements"]):
        assert f"{element.position} {element.kind}" in text


def test_units_table_lists_every_unit_failing_first(lot_html, lot_store):
    _, text = lot_html
    rows = unit_rows(text)
    with ResultsStore(lot_store, mode="r") as store:
        shared = store.get_lot(HOSTILE_LOT)["shared"]
    worst = dict(zip(shared["unit_ids"], shared["worst_rl_db"]))
    assert sorted(name for name, _ in rows) == sorted(NAMES)
    statuses = [status for _, status in rows]
    n_fail = len(shared["failing_unit_ids"])
    assert statuses == ["fail"] * n_fail + ["pass"] * (len(NAMES) - n_fail)
    failing = [name for name, _ in rows[:n_fail]]
    assert failing == sorted(shared["failing_unit_ids"], key=worst.get)     # worst first
    passing = [name for name, _ in rows[n_fail:]]
    assert passing == sorted(passing)


def test_unit_sections_are_bounded_and_linked(lot_html, lot_store):
    _, text = lot_html
    page = Page(text)
    ids = {a["id"] for _, a in page.tags if "id" in a}
    links = [a["href"][1:] for a in page.all("a") if a.get("href", "").startswith("#")]
    assert set(links) <= ids                                    # every link lands somewhere
    sections = [a["id"] for a in page.all("article")]
    assert len(sections) == 4
    assert "Plots for 4 of 11 units" in text and "all 2 failing units among them" in text
    with ResultsStore(lot_store, mode="r") as store:
        view = load_lot(store, HOSTILE_LOT)
    lowest = sorted(view.units, key=lambda u: u.after_rl_db)[:4]
    assert sections == [f"unit-{u.record.index}" for u in lowest]


def test_unit_plots_zero_leaves_the_table_whole(lot_store, tmp_path):
    text = write_report(lot_store, tmp_path, unit_plots=0).read_text(encoding="utf-8")
    page = Page(text)
    assert not page.all("article")
    assert len(page.all("img")) == 4
    assert len(unit_rows(text)) == len(NAMES)
    assert not [a for a in page.all("a") if a.get("href", "").startswith("#unit-")]


def test_plotted_units_take_failing_units_first(lot_store):
    with ResultsStore(lot_store, mode="r") as store:
        view = load_lot(store, HOSTILE_LOT)
    picked = plotted_units(view.units, 3)
    assert [view.units[i].passes for i in picked] == [False, False, True]
    rl = [view.units[i].after_rl_db for i in picked]
    assert rl == sorted(rl)
    assert plotted_units(view.units, 100) == sorted(range(len(view.units)),
                                                    key=lambda i: (view.units[i].passes,
                                                                   view.units[i].after_rl_db))


def test_failed_file_is_listed_with_its_reason(lot_html):
    _, text = lot_html
    section = text.split('<section id="unreadable">', 1)[1].split("</section>", 1)[0]
    visible = "".join(Page(section).text)
    assert f"{HOSTILE_BROKEN}.s1p" in visible
    assert ":4:" in visible                            # the reader names the bad line


# --------------------------------------------------------------------------- tests: RF checks

def _skrf_s11_with(elements, freq_hz, s11_load, z0):
    """S11 at the source port, cascading the ladder with scikit-rf (independent of
    pipeline.networks): elements source -> load, then the measured load as a 1-port."""
    import skrf
    from skrf.media import DefinedGammaZ0

    media = DefinedGammaZ0(skrf.Frequency.from_f(freq_hz, unit="Hz"), z0=z0)
    load = skrf.Network(frequency=media.frequency, s=s11_load.reshape(-1, 1, 1), z0=z0)
    make = {("series", "inductor"): media.inductor, ("series", "capacitor"): media.capacitor,
            ("shunt", "inductor"): media.shunt_inductor, ("shunt", "capacitor"): media.shunt_capacitor}
    chain = [make[(e.position, e.kind)](e.value) for e in elements]
    network = chain[0]
    for part in chain[1:]:
        network = network ** part
    return (network ** load).s[:, 0, 0]


def test_shared_network_curve_matches_a_scikit_rf_cascade(lot_store):
    with ResultsStore(lot_store, mode="r") as store:
        view = load_lot(store, HOSTILE_LOT)
    assert view.shared_elements and all(e.model.is_ideal for e in view.shared_elements)
    for unit in view.units[:3]:
        r = unit.record
        expected = _skrf_s11_with(view.shared_elements, r.freq_hz, r.s11_dut, r.z0_ohm)
        np.testing.assert_allclose(unit.shared_s11, expected, atol=1e-9)
        # The worst in-band RL on the measured points agrees with the lot job's figure
        # (computed on its common grid with the band edges interpolated) to 0.3 dB.
        inside = unit.in_band
        worst = float(np.min(-20 * np.log10(np.abs(expected[inside]))))
        assert unit.shared_worst_rl_db == pytest.approx(worst, abs=0.3)


def test_elements_round_trip_through_json():
    elements = (Element("shunt", "capacitor", 4.7e-12, PartModel(esr_ohm=0.3, srf_hz=6e9)),
                Element("series", "inductor", 6.8e-9, PartModel(q=35.0, q_ref_hz=1e9, srf_hz=4e9)),
                Element("series", "capacitor", 1.8e-11))
    assert tuple(Element.from_dict(d) for d in json.loads(json.dumps([e.as_dict() for e in elements]))) == elements


def test_stored_headroom_summarises_like_the_original(lot_store):
    with ResultsStore(lot_store, mode="r") as store:
        view = load_lot(store, HOSTILE_LOT)
    originals, rebuilt = [], []
    for unit in view.units:
        r = unit.record
        z = r.z0_ohm * (1 + r.s11_dut) / (1 - r.s11_dut)
        original = analyse_band(r.freq_hz, z, BAND, r.rl_after_worst_db, SPEC_DB)
        originals.append(original)
        rebuilt.append(r.headroom)
    assert summarise_lot(rebuilt) == summarise_lot(originals)         # JSON keeps every float


def test_lot_report_shows_the_headroom_spread(lot_html, lot_store):
    _, text = lot_html
    section = text.split('<section id="headroom">', 1)[1].split("</section>", 1)[0]
    with ResultsStore(lot_store, mode="r") as store:
        view = load_lot(store, HOSTILE_LOT)
    stats = summarise_lot(u.record.headroom for u in view.units)
    assert f'{stats["q_estimate"]["median"]:.3g}' in section
    assert f'{stats["headroom_db"]["median"]:.1f}' in section and f'{stats["rl_bound_db"]["p90"]:.1f}' in section
    assert len(Page(section).all("img")) == 1


# --------------------------------------------------------------------------- other lots

def test_lot_without_a_summary_uses_each_units_own_network(tmp_path):
    store = build_store(tmp_path, "watched", ["U-0001", "U-0002", "U-0004"], analyse=False)
    text = write_report(store, tmp_path / "out").read_text(encoding="utf-8")
    assert "No lot summary is stored for this lot" in text
    assert "RL with shared network" not in text
    assert len(unit_rows(text)) == 3 and len(Page(text).all("img")) == 4 + 3


def test_stale_summary_and_a_second_lot(tmp_path, capsys):
    """Units stored after the lot job ran are shown, with the shared network applied to
    them and a note; a second lot without a summary is reported on its own with --lot."""
    store = build_store(tmp_path / "a", "A", ["U-0001", "U-0002", "U-0003"], mc_trials=100)
    later = tmp_path / "later"
    later.mkdir()
    extra = write_lot(later, ["U-0004", "U-0020"], seed=2, detuned=DETUNED)
    with ResultsStore(store, mode="a") as s:
        process_lot(s, extra[:1], Settings(band_hz=BAND, spec_rl_db=SPEC_DB, lot="A"), workers=1)
        process_lot(s, extra[1:], Settings(band_hz=BAND, spec_rl_db=SPEC_DB, lot="B"), workers=1)
    assert main(["report", str(store), "-o", str(tmp_path / "r")]) == 2
    assert "holds 2 lots (A, B)" in capsys.readouterr().err
    text_a = write_report(store, tmp_path / "r", lot="A").read_text(encoding="utf-8")
    assert "The stored lot summary covers 3 units; the store now holds 4" in text_a
    rows = dict(unit_rows(text_a))
    assert sorted(rows) == ["U-0001", "U-0002", "U-0003", "U-0004"] and rows["U-0004"] == "fail"
    text_b = write_report(store, tmp_path / "r", lot="B").read_text(encoding="utf-8")
    assert "No lot summary is stored for this lot" in text_b
    assert [name for name, _ in unit_rows(text_b)] == ["U-0020"]


def test_lot_of_unreadable_files_only(tmp_path):
    files = tmp_path / "files"
    files.mkdir()
    settings = Settings(band_hz=BAND, lot="bad-lot")
    with ResultsStore(tmp_path / "r.h5", mode="a") as store:
        process_lot(store, [write_broken(files, "X1"), write_broken(files, "X2")], settings, workers=1)
        analyse_lot(store, "bad-lot", settings)
    text = write_report(tmp_path / "r.h5", tmp_path / "out").read_text(encoding="utf-8")
    assert "No unit of this lot could be stored" in text
    assert "X1.s1p" in text and "X2.s1p" in text
    assert not Page(text).all("img")


# --------------------------------------------------------------------------- one unit

def test_unit_report(lot_store, tmp_path):
    path = write_report(lot_store, tmp_path, dut="U-0004")
    text = path.read_text(encoding="utf-8")
    page = Page(text)
    assert path.name == "U-0004.html"
    assert len(page.all("img")) == 1
    with ResultsStore(lot_store, mode="r") as store:
        unit, summary = load_unit(store, "U-0004")
    assert unit.shared_s11 is not None and not unit.passes
    hd = unit.record.headroom
    assert f"{hd['rl_bound_db']:.1f}" in text and f"{hd['q_estimate']:.1f}" in text
    assert "fails the spec" in text
    assert escape(unit.record.source) in text and unit.record.source_sha256 in text
    assert png_of(page.all("img")[0]["src"]).size[0] > 1000


def test_unit_report_of_the_hostile_name(lot_store, tmp_path):
    path = write_report(lot_store, tmp_path, dut=HOSTILE_UNIT)
    text = path.read_text(encoding="utf-8")
    assert HOSTILE_UNIT not in text and escape(HOSTILE_UNIT) in text
    assert path.parent == tmp_path and "<" not in path.name


# --------------------------------------------------------------------------- figures

def test_unit_figure_draws_the_shared_curve_and_the_bound():
    from pipeline.plots import match_figure

    f = np.linspace(800e6, 1e9, 201)
    z = 20 + 1j * (2 * np.pi * f * 30e-9 - 1 / (2 * np.pi * f * 1e-12))
    s11 = (z - 50) / (z + 50)
    fig = match_figure(f, s11, s11 * 0.2, BAND, 50.0, (), title="$a$b$", rl_bound_db=18.0,
                       spec_rl_db=10.0, others=[("shared network", s11 * 0.5)])
    ax = fig.axes[0]
    labels = [line.get_label() for line in ax.get_lines()]
    assert "shared network" in labels
    assert any(line.get_linestyle() == "--" and list(line.get_ydata()) == [18.0, 18.0]
               for line in ax.get_lines())                                  # the bound, dashed
    assert any("Bode–Fano bound  RL 18.0 dB (dashed)" in t.get_text() for t in ax.texts)
    assert fig._suptitle.get_text() == "$a$b$"          # drawn as text, not maths
    fig.canvas.draw()
    high = match_figure(f, s11, s11 * 0.2, BAND, 50.0, (), rl_bound_db=80.0, spec_rl_db=10.0)
    assert any("Bode–Fano bound  RL 80.0 dB (above the chart)" in t.get_text() for t in high.axes[0].texts)
    assert not [line for line in high.axes[0].get_lines() if list(line.get_ydata()) == [80.0, 80.0]]


def test_lot_figures_with_units_on_different_grids():
    from pipeline import report_figures as figures

    rng = np.random.default_rng(3)
    freqs = [np.linspace(700e6, 1.1e9, n) for n in (101, 151, 201)]
    gammas = [0.6 * np.exp(1j * (f / 1e8 + rng.uniform(0, 1))) for f in freqs]
    matched = [0.1 * g for g in gammas]
    failing = np.array([False, True, False])
    for picture in (figures.rl_curves(freqs, gammas, matched, failing, BAND, SPEC_DB),
                    figures.lot_smith(gammas, matched, failing, SPEC_DB),
                    figures.rl_histogram(np.array([4.0, 5.0, 6.0]), np.array([12.0, 8.0, 15.0]),
                                         np.array([14.0, 13.0, 16.0]), SPEC_DB)):
        image = png_of(picture.uri).convert("RGB")
        assert image.size == (picture.width, picture.height)
        pixels = np.asarray(image).reshape(-1, 3)
        assert np.mean(np.any(pixels < 235, axis=1)) > 0.02           # something is drawn
    assert figures.headroom_figure(np.array([np.nan]), np.array([np.nan])) is None


# --------------------------------------------------------------------------- command line

def test_cli_writes_the_lot_report_and_prints_its_path(lot_store, tmp_path, capsys):
    status = main(["report", str(lot_store), "-o", str(tmp_path / "r"), "--unit-plots", "1"])
    out, err = capsys.readouterr()
    assert status == 0 and err == ""
    path = Path(out.strip())
    assert path.parent == tmp_path / "r" and path.suffix == ".html"
    assert len(Page(path.read_text(encoding="utf-8")).all("article")) == 1


@pytest.mark.parametrize("args, message", [
    (["--lot", "no-such-lot"], "no lot 'no-such-lot' in the store"),
    (["--dut", "no-such-unit"], "no unit 'no-such-unit' in the store"),
    (["--unit-plots", "-1"], "--unit-plots must be 0 or more"),
])
def test_cli_bad_requests_are_one_line_and_exit_2(lot_store, tmp_path, capsys, args, message):
    status = main(["report", str(lot_store), "-o", str(tmp_path / "r"), *args])
    out, err = capsys.readouterr()
    assert status == 2 and out == ""
    assert err.count("\n") == 1 and message in err
    assert not (tmp_path / "r").exists()


def test_cli_missing_store_and_store_of_several_lots(tmp_path, capsys):
    assert main(["report", str(tmp_path / "none.h5"), "-o", str(tmp_path / "r")]) == 2
    assert "no such results store" in capsys.readouterr().err
    store = tmp_path / "two.h5"
    with ResultsStore(store, mode="a") as s:
        s.put_lot("A", {"lot": "A", "n_units": 0})
        s.put_lot("B", {"lot": "B", "n_units": 0})
    assert main(["report", str(store), "-o", str(tmp_path / "r")]) == 2
    err = capsys.readouterr().err
    assert "holds 2 lots (A, B): choose one with --lot" in err and err.count("\n") == 1
    assert not (tmp_path / "r").exists()


def test_cli_output_folder_that_is_a_file(lot_store, tmp_path, capsys):
    blocker = tmp_path / "taken"
    blocker.write_text("not a folder")
    assert main(["report", str(lot_store), "-o", str(blocker)]) == 2
    assert "is not a folder" in capsys.readouterr().err
    assert blocker.read_text() == "not a folder"


def test_console_script_entry_point(lot_store, tmp_path):
    """The real process: ``python -m``-style entry through pipeline.cli.main."""
    result = subprocess.run([sys.executable, "-c", "import sys; from pipeline.cli import main; "
                             "sys.exit(main())", "report", str(lot_store), "--dut", "U-0001",
                             "-o", str(tmp_path)], capture_output=True, text=True, cwd=ROOT,
                            timeout=120)
    assert result.returncode == 0, result.stderr
    assert Path(result.stdout.strip()) == tmp_path / "U-0001.html"
