"""Tests of selector.plots and selector.report: every picture, a self-contained page, a real browser."""

from __future__ import annotations

import base64
import io
import re
import shutil
import subprocess
from html.parser import HTMLParser
from pathlib import Path

import numpy as np
import pytest
from PIL import Image

from selector.jobs import tune
from selector.core import photometry as ph
from selector.present import plots, report
from selector.cli import main
from selector.store.cache import load_cache
from selector.store.layout import layout_of

PNG_MAGIC = b"\x89PNG\r\n\x1a\n"


@pytest.fixture(scope="module")
def demo_run(small_demo):
    """The shared small demo run (read-only): its configuration."""
    return small_demo[0]


@pytest.fixture(scope="module")
def cache(demo_run):
    return load_cache(demo_run, tune.needed_columns(demo_run, plots=True))


def _data(cache, cfg, settings=()):
    changed = tune.with_settings(cfg, list(settings)) if settings else cfg
    return plots.PlotData.from_evaluation(cache, tune.evaluate(cache, changed))


def _png_size(png: bytes) -> tuple[int, int]:
    assert png[:8] == PNG_MAGIC
    with Image.open(io.BytesIO(png)) as im:
        im.verify()
    with Image.open(io.BytesIO(png)) as im:
        return im.size


# --- pictures -------------------------------------------------------------------------------------

def test_every_plot_is_produced_and_deterministic(demo_run, cache):
    data = _data(cache, demo_run, ['colours.criteria=["stern2012", "assef2013_r90", "mateos2012_wedge"]'])
    assert data.candidate.sum() > 0
    first = plots.render_plots(data)
    # without truth labels the completeness picture has nothing to show and is left out
    assert list(first) == [p.name for p in plots.PLOTS if p.name != "completeness"]
    assert set(first) == {"cutflow", "colour_colour", "colour_magnitude", "motion", "score", "sky", "pm_plane",
                          "parallax_error", "separations", "magnitudes"}
    for name, png in first.items():
        w, h = _png_size(png)
        assert w == 1000 and h >= 300, name  # sized for a screen and a proposal page
    for plot in plots.PLOTS[:2]:  # same data, same bytes (two pictures: drawing all again costs seconds)
        assert plots.draw_png(plot.draw, data) == first[plot.name]
    assert len(set(first.values())) == len(first)
    # every caption says what to look for, in its own words (not the title again)
    captions = [p.caption for p in plots.PLOTS]
    assert len(set(captions)) == len(captions) and all(len(c) > 60 for c in captions)


def test_completeness_against_magnitude_counts_truth_quasars(demo_run, cache):
    data = _data(cache, demo_run)
    assert plots.completeness_magnitude(data) is None  # no truth, no picture
    mag = next(iter(data.opt_mags_ab.values()))
    data.truth_quasar = np.isfinite(mag) & (np.arange(len(mag)) % 2 == 0)
    fig = plots.completeness_magnitude(data)
    line = fig.axes[0].lines[0]
    x, y = np.asarray(line.get_xdata()), np.asarray(line.get_ydata())
    # each point is selected / labelled within its 0.5 mag bin, recomputed here with numpy's histogram
    q = data.truth_quasar
    edges = np.concatenate([x - 0.25, [x[-1] + 0.25]])
    n, _ = np.histogram(np.clip(mag[q], edges[0], edges[-1] - 1e-9), bins=edges)
    k, _ = np.histogram(np.clip(mag[q & data.candidate], edges[0], edges[-1] - 1e-9), bins=edges)
    with np.errstate(invalid="ignore"):
        assert np.allclose(y, k / n, equal_nan=True)


def test_sky_map_draws_the_galactic_plane(demo_run, cache):
    fig = plots.sky_map(_data(cache, demo_run))
    ax = fig.axes[0]
    plane = [ln for ln in ax.lines if ln.get_linestyle() == "-"]
    assert plane and ax.get_xlabel().startswith("right ascension") and ax.get_ylabel().startswith("declination")
    # every point of the drawn b = 0 line is on the Galactic equator by astropy's own frame (reference library)
    from astropy.coordinates import SkyCoord
    import astropy.units as u

    lon = np.concatenate([ln.get_xdata() for ln in plane])
    lat = np.concatenate([ln.get_ydata() for ln in plane])
    ra = np.mod(-np.degrees(lon), 360.0)
    b = SkyCoord(ra=ra * u.deg, dec=np.degrees(lat) * u.deg, frame="icrs").galactic.b.deg
    assert np.abs(b).max() < 1e-6


def test_separation_plot_marks_the_match_radius(demo_run, cache):
    data = _data(cache, demo_run)
    fig = plots.match_separations(data)
    xs = {round(float(ln.get_xdata()[0]), 6) for ln in fig.axes[0].lines if len(set(ln.get_xdata())) == 1}
    assert xs == {demo_run.match.radius_arcsec}
    assert np.nanmax(data.sep_arcsec) <= demo_run.match.radius_arcsec


def test_score_plot_shows_the_classifier_when_there_is_one(demo_run, cache):
    data = _data(cache, demo_run, ["classifier.threshold=0.8"])
    assert len(plots.score_distribution(data).axes) == 1
    data.p_quasar = np.linspace(0.0, 1.0, len(data.score))
    fig = plots.score_distribution(data)
    assert len(fig.axes) == 2
    assert [ln.get_xdata()[0] for ln in fig.axes[1].lines] == [0.8]


def test_thresholds_drawn_follow_the_config(demo_run, cache):
    a = plots.motion_statistics(_data(cache, demo_run))
    b = plots.motion_statistics(_data(cache, demo_run, ["motion.parallax_snr_max=5", "motion.pm_pvalue_min=0.01"]))

    def vlines(fig):
        return sorted({round(float(ln.get_xdata()[0]), 6) for ax in fig.axes for ln in ax.lines
                       if len(set(ln.get_xdata())) == 1})

    # the parallax cut is one-sided; below zero the line is the quality cut's (negative_parallax_snr_max = 5)
    assert vlines(a) == [-5.0, 3.0, round(-2 * np.log(0.001), 6)]
    # the χ² limit is −2 ln p for two degrees of freedom: p = exp(−χ²/2) (scipy's chi2.sf as reference)
    from scipy.stats import chi2

    assert chi2.sf(-2 * np.log(0.01), 2) == pytest.approx(0.01)
    assert vlines(b) == [-5.0, 5.0, round(-2 * np.log(0.01), 6)]


def test_colour_magnitude_boundaries_come_from_photometry(demo_run, cache):
    fig = plots.colour_magnitude(_data(cache, demo_run, ['colours.criteria=["assef2018_r75", "stern2012"]']))
    lines = {ln.get_label().split(":")[0]: ln for ln in fig.axes[0].lines}
    assef = lines["assef2018_r75"]
    k = ph.ASSEF2018_R75
    x = np.asarray(assef.get_xdata())
    assert np.allclose(assef.get_ydata(), ph.assef_boundary_colour_vega(x, k.alpha, k.beta, k.gamma))
    stern = lines["stern2012"]
    assert list(stern.get_xdata())[1] == ph.STERN2012_MAG_4P6_MAX_VEGA
    assert list(stern.get_ydata())[0] == ph.STERN2012_COLOUR_MIN_VEGA


def test_wedge_in_vega_colours_lies_on_the_criterion_boundary():
    """Mapped back to magnitudes, every corner of the drawn wedge is on the criterion's edge."""
    wedge = ph.CRITERIA["mateos2012_wedge"]
    (curve,) = wedge.curves(plots.COLOUR_COLOUR, (-0.5, 2.5), (-0.5, 2.5))
    x, y = curve.x, curve.y  # [4.6]−[12], [3.4]−[4.6]
    m2 = np.full(len(x), 14.0)
    res = ph.mateos2012_wedge({"3.4": m2 + y, "4.6": m2, "12": m2 - x})
    assert np.allclose(res.excess_mag, 0.0, atol=1e-9)
    # a point between the two long edges, above the short one, is selected
    mid = ph.mateos2012_wedge({"3.4": np.array([14.0 + y[1:3].mean() + 0.3]), "4.6": np.array([14.0]),
                               "12": np.array([14.0 - x[1:3].mean()])})
    assert mid.passed[0]


def test_a_new_criterion_is_one_registry_entry(demo_run, cache, monkeypatch):
    """A criterion added to the registry alone is accepted by the config, selected, and drawn in both
    diagrams from its own object (the plots hold no per-criterion code)."""

    def select(mags):
        c = mags["3.4"] - mags["4.6"]
        return ph.CriterionResult(c > 0.5, c - 0.5)

    def boundary(name, plane, xlim, ylim):
        if tuple(plane.y) != ("3.4", "4.6"):
            return ()
        return (ph.Curve(np.array(xlim), [0.5, 0.5], f"{name}: > 0.5"),)

    extra = ph.Criterion(name="invented_test", bands=("3.4", "4.6"), select=select, boundary=boundary,
                         style=ph.LineStyle("#123456", ":"), reference="invented for this test")
    monkeypatch.setitem(ph.CRITERIA, extra.name, extra)
    data = _data(cache, demo_run, ['colours.criteria=["invented_test", "mateos2012_wedge"]'])
    assert data.candidate.sum() > 0
    for draw in (plots.colour_colour, plots.colour_magnitude):
        fig = draw(data)
        line = next(ln for ln in fig.axes[0].lines if ln.get_label().startswith("invented_test"))
        assert line.get_color() == "#123456" and list(line.get_ydata()) == [0.5, 0.5]
    # the wedge has no line against a magnitude: the colour–magnitude title says so
    assert "mateos2012_wedge" in plots.colour_magnitude(data).axes[0].get_title()


def test_sky_map_shows_the_healpix_density(demo_run, cache):
    import healpy as hp

    data = _data(cache, demo_run)
    fig = plots.sky_map(data)
    mesh = next(c for c in fig.axes[0].collections if hasattr(c, "get_array"))
    nside = 1 << demo_run.tiling.order
    counts = np.bincount(hp.ang2pix(nside, data.ra_deg[data.candidate], data.dec_deg[data.candidate],
                                    nest=True, lonlat=True), minlength=hp.nside2npix(nside))
    area_deg2 = hp.nside2pixarea(nside, degrees=True)  # 41253/12/nside² deg² (Górski et al. 2005)
    assert float(np.ma.max(mesh.get_array())) == pytest.approx(counts.max() / area_deg2)


def test_funnel_lists_every_stage():
    fig = plots.cutflow_funnel([("input", 1000), ("matched", 600), ("infrared_colour", 3)])
    ax = fig.axes[0]
    assert [t.get_text() for t in ax.get_yticklabels()] == ["input", "matched", "infrared_colour"]
    assert any("3  (0.30%)" in t.get_text() for t in ax.texts)


# --- the page -------------------------------------------------------------------------------------

class _Page(HTMLParser):
    def __init__(self):
        super().__init__()
        self.images, self.tags, self.targets, self.in_targets = [], [], 0, False
        self.attrs_seen = []

    def handle_starttag(self, tag, attrs):
        a = dict(attrs)
        self.tags.append(tag)
        self.attrs_seen += [(k, v or "") for k, v in attrs]
        if tag == "img":
            self.images.append(a.get("src", ""))
        if tag == "table" and a.get("id") == "targets":
            self.in_targets = True
        if tag == "tr" and self.in_targets and a.get("class") == "target":
            self.targets += 1

    def handle_endtag(self, tag):
        if tag == "table":
            self.in_targets = False


def _parse(text: str) -> _Page:
    page = _Page()
    page.feed(text)
    return page


def _check_self_contained(text: str) -> None:
    page = _parse(text)
    assert "script" not in page.tags and "link" not in page.tags and "iframe" not in page.tags
    for key, value in page.attrs_seen:
        if key in ("src", "href", "action", "poster", "srcset"):
            assert value.startswith("data:image/png;base64,"), (key, value[:60])
    without_data = re.sub(r"data:image/png;base64,[A-Za-z0-9+/=]+", "", text)
    assert not re.search(r"(?i)\b(?:https?|ftp|wss?):", without_data)
    assert not re.search(r"(?i)url\s*\(|@import|//[a-z0-9.-]+\.[a-z]{2,}", without_data)


@pytest.fixture(scope="module")
def moved_run(demo_run, tmp_path_factory):
    """The run folder alone, copied somewhere else (no config file, no ingested tiles beside it)."""
    dest = tmp_path_factory.mktemp("moved") / "run"
    shutil.copytree(layout_of(demo_run).run_dir, dest)
    return dest


@pytest.fixture(scope="module")
def moved_page(moved_run) -> str:
    """The report of the moved run folder (read alone), top 20 rows."""
    return report.write_report(run_dir=moved_run, top=20).read_text(encoding="utf-8")


def test_report_is_self_contained_and_complete(demo_run, moved_run, moved_page):
    text = moved_page
    _check_self_contained(text)
    page = _parse(text)
    n_cands = load_config_candidates(demo_run)
    assert page.targets == min(20, n_cands) > 0
    # the moved folder has no target list, no truth and no classifier: the selection's pictures only
    assert len(page.images) == len(plots.PLOTS) - 1
    for src in page.images:
        _png_size(base64.b64decode(src.split(",", 1)[1]))
    import json

    prov = json.loads((layout_of(demo_run).run_dir / "provenance.json").read_text())
    assert prov["config_hash"] in text and prov["match_config_hash"] in text
    assert "Note:" not in text  # the recorded candidates are what the cache gives
    assert report.build_report(run_dir=moved_run, top=20) == text  # no clock in the page
    assert f"Top 20 candidates of {n_cands:,d}" in text


def test_report_leads_with_results_and_ends_with_settings(moved_page):
    text = moved_page
    order = [text.index(f"<section id='{s}'") for s in ("results", "ranked", "plots", "provenance", "settings")]
    assert order == sorted(order)
    assert [s.id for s in report.SECTIONS][:2] == ["results", "ranked"]


def test_settings_table_lists_every_selection_key(demo_run, moved_page):
    from selector.settings.config import SELECTION_SECTIONS, plain

    text = moved_page
    shown = dict(report.selection_settings(demo_run))

    def leaves(prefix, value):
        if isinstance(value, dict) and value:
            for k, v in value.items():
                yield from leaves(f"{prefix}.{k}", v)
        else:
            yield prefix

    data = plain(demo_run)
    expected = {key for s in SELECTION_SECTIONS for key in leaves(s, data[s])}
    assert set(shown) == expected
    assert "classifier.require_colour_criteria" in shown  # once left out of the table
    table = text[text.index("<table id='selection'>"):]
    table = table[:table.index("</table>")]
    assert all(f">{key}<" in table for key in expected)


@pytest.fixture(scope="module")
def with_targets(small_demo, tmp_path_factory):
    """A copy of the demo run with its target list made (its config has a [targets] section; truth lies
    beside it). The shared run is read-only, so the whole folder is copied first."""
    from selector.jobs.targets import make_targets
    from selector.settings.config import load_config

    _, path, _ = small_demo
    dest = tmp_path_factory.mktemp("with_targets") / "demo"
    shutil.copytree(path.parent, dest)
    cfg = load_config(dest / path.name)
    result = make_targets(cfg, log=lambda *a: None)
    return cfg, result


@pytest.fixture(scope="module")
def targets_page(with_targets, tmp_path_factory) -> Path:
    """The report made from the configuration: target list, truth labels, top 10 rows."""
    cfg, _ = with_targets
    return report.write_report(cfg, out=tmp_path_factory.mktemp("targets_page") / "report.html", top=10)


def test_report_shows_the_target_list_and_truth(with_targets, targets_page):
    cfg, result = with_targets
    text = targets_page.read_text(encoding="utf-8")
    _check_self_contained(text)
    listed = len(result.targets)
    assert listed > 0
    assert _parse(text).targets == min(10, listed)
    heading = text[text.index("<h2 id='ranked-heading'>"):]
    assert "targets" in heading[:heading.index("</h2>")]
    # known objects and sources the site never sees are counted at the top and are not in the table
    dropped = result.counts["dropped"]
    assert f">{dropped['known_object']:,d}</div><div class='label'>known objects removed" in text
    never = sum(dropped[c] for c in ("below_altitude_limit", "not_in_dark_time", "moon_too_close"))
    assert f">{never:,d}</div><div class='label'>never observable from" in text
    shown_ids = set(_table_column(text, "targets", "astrometric id"))
    gone = {str(v) for v in result.dropped["astro_id"]}
    assert shown_ids and not shown_ids & gone
    for name in ("visibility", "completeness"):
        assert f"id='plot-{name}'" in text, name
    assert "completeness against the truth labels" in text


def _table_column(text: str, table_id: str, heading: str) -> list[str]:
    """The cells under one heading of the page's table ``table_id``."""
    table = text[text.index(f"<table id='{table_id}'>"):]
    table = table[:table.index("</table>")]
    rows = [re.findall(r"<t[hd][^>]*>(.*?)</t[hd]>", row) for row in re.findall(r"<tr[^>]*>(.*?)</tr>", table)]
    col = rows[0].index(heading)
    return [r[col] for r in rows[1:]]


def load_config_candidates(cfg) -> int:
    from selector.store.io import read_parquet

    return read_parquet(layout_of(cfg).run_dir / "candidates.parquet").num_rows


def test_report_command(demo_run, tmp_path, capsys):
    out = tmp_path / "page.html"
    # (a run folder read alone, as `--run DIR` does, is the page of the tests above)
    assert main(["report", "--run", str(tmp_path / "nowhere")]) == 2
    err = capsys.readouterr().err.strip()
    assert "\n" not in err and "provenance.json" in err
    # like every other command, --config names the run
    config_path = Path(demo_run.base_dir) / "demo.toml"
    assert main(["report", "--config", str(config_path), "--out", str(out), "--top", "3"]) == 0
    assert _parse(out.read_text(encoding="utf-8")).targets == 3


# --- a real browser -------------------------------------------------------------------------------

_PROBE = """<script>
window.addEventListener('load', function () {
  var found = [];
  for (var i = 0; i < document.images.length; i++) {
    var im = document.images[i];
    found.push(im.complete && im.naturalWidth > 0 ? im.naturalWidth + 'x' + im.naturalHeight : 'broken');
  }
  document.body.setAttribute('data-probe', found.join(','));
  var box = function (id) { var r = document.getElementById(id).getBoundingClientRect(); return Math.ceil(r.bottom); };
  document.body.setAttribute('data-fold', box('results') + ',' + box('ranked-heading') + ',' + window.innerHeight);
});
</script>"""

#: The first screen of a laptop: what must show the results without scrolling.
FIRST_SCREEN = (1280, 800)


def _browser() -> str | None:
    return shutil.which("chromium") or shutil.which("chromium-browser")


def _flags(tmp_path, size) -> list[str]:
    return ["--headless", "--no-sandbox", "--disable-gpu", "--disable-quic", "--no-first-run", "--hide-scrollbars",
            "--disable-background-networking", "--disable-component-update", "--disable-sync",
            "--disable-extensions", "--virtual-time-budget=10000", f"--user-data-dir={tmp_path / 'profile'}",
            f"--window-size={size[0]},{size[1]}"]


def test_report_renders_in_a_headless_browser(targets_page, tmp_path):
    exe = _browser()
    if exe is None:
        pytest.skip("no headless browser: install Debian's chromium package (.ci/run does this when run as root)")
    page_path = targets_page
    text = page_path.read_text(encoding="utf-8")
    sizes = [_png_size(base64.b64decode(s.split(",", 1)[1])) for s in _parse(text).images]
    # a copy with a probe that records, after loading, what the browser decoded for each image and where
    # the headline section and the ranked table's heading end on the first screen
    probed = tmp_path / "probed.html"
    probed.write_text(text.replace("</body>", _PROBE + "</body>"), encoding="utf-8")
    dom = subprocess.run([exe, *_flags(tmp_path, FIRST_SCREEN), "--dump-dom", probed.as_uri()], capture_output=True,
                         text=True, timeout=120, check=True).stdout
    assert _parse(dom).targets == 10
    probe = re.search(r'data-probe="([^"]*)"', dom)
    assert probe, "the browser did not finish loading the page"
    assert probe.group(1).split(",") == [f"{w}x{h}" for w, h in sizes]
    fold = re.search(r'data-fold="(\d+),(\d+),(\d+)"', dom)
    results_bottom, ranked_bottom, height = map(int, fold.groups())
    # the window's inner height (a headless window keeps some of its 800 px for itself): a stricter fold
    assert 0 < height <= FIRST_SCREEN[1]
    assert results_bottom < ranked_bottom <= height, "the first screen must hold the results and the ranked table's heading"
    shot = tmp_path / "shot.png"
    subprocess.run([exe, *_flags(tmp_path, FIRST_SCREEN), f"--screenshot={shot}", page_path.as_uri()],
                   capture_output=True, timeout=120, check=True)
    with Image.open(shot) as im:
        pixels = np.asarray(im.convert("L"))
    assert pixels.shape == (FIRST_SCREEN[1], FIRST_SCREEN[0])
    assert pixels.std() > 10  # text, numbers and a table, not a blank page
