"""
Browser checks of map.html and report.html in Debian's chromium.

The pages are opened from file:// with every non-file request aborted and
recorded: they must render with no console errors and no network requests,
show the expected features, open popups, and show a hostile value as text
without running it.
"""

import os
from pathlib import Path

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
import pytest  # noqa: E402

from geosp import tables  # noqa: E402
from geosp.models import Detection, FaultSegment, Raster, Stations  # noqa: E402
from geosp.report import make_report, source_parameter_table  # noqa: E402
from geosp.webmap import CAUTIONS, make_webmap  # noqa: E402

pytestmark = pytest.mark.browser

CHROMIUM = "/usr/bin/chromium"
HOSTILE = '<img src=x onerror="window.__pwned=1">'
CRS = "EPSG:32633"
ARTIFACTS = Path(__file__).resolve().parents[1] / "test-artifacts"
N_SIDE = 5  # stations per side of the synthetic grid

if not os.path.exists(CHROMIUM):
    pytest.skip(f"{CHROMIUM} is missing (install Debian's chromium package)",
                allow_module_level=True)
sync_api = pytest.importorskip("playwright.sync_api",
                               reason="python playwright is not installed (extra 'browser')")


def build_pages(folder):
    e = 500000.0 + np.arange(N_SIDE) * 100.0
    n = 4000000.0 + np.arange(N_SIDE) * 100.0
    east, north = np.meshgrid(e, n)
    sp = 30.0 * np.tanh((east - 500200.0) / 100.0)
    ids = [f"S{i:03d}" for i in range(east.size)]
    ids[12] = HOSTILE  # the centre station
    stations = Stations(station_id=ids, easting=east.ravel(), northing=north.ravel(),
                        upward=np.zeros(east.size), sp_mv=sp.ravel(), crs=CRS,
                        flag=[""] * 12 + [HOSTILE] + [""] * 12)
    seg = FaultSegment(HOSTILE, "F1-1", np.array([[500250.0, 4000000.0], [500250.0, 4000400.0]]),
                       0.0, 400.0)
    seg2 = FaultSegment("F2", "F2-1", np.array([[500000.0, 4000050.0], [500400.0, 4000050.0]]),
                        90.0, 400.0)
    dets = [Detection(seg, np.arange(5), 25, 6.2, 1, True, 3.0, 2.0, {}, note=HOSTILE),
            Detection(seg2, np.arange(5), 10, 0.8, -1, False, 3.0, 2.0, {})]
    rows = [dict(source_id="S1", fault_id=HOSTILE, segment_id="F1-1", model="fault_patch",
                 top_x=500250.0, top_y=4000200.0, strike_deg=0.0, dip_deg=70.0,
                 dip_dir_deg=90.0, top_depth_m=30.0, bottom_depth_m=200.0, length_m=300.0,
                 jump_mv=60.0, top_depth_lo_m=25.0, top_depth_hi_m=36.0, jump_lo_mv=50.0,
                 jump_hi_mv=70.0, rms_mv=2.0, chi2_red=1.05, n_stations=25, bic_gain=80.0,
                 sigma_ratio=1.0, flags=HOSTILE)]
    ge = 500000.0 + np.arange(0.0, 450.0, 25.0)
    gn = 4000000.0 + np.arange(0.0, 450.0, 25.0)
    gee, _ = np.meshgrid(ge, gn)
    grid = Raster(ge, gn, 30.0 * np.tanh((gee - 500200.0) / 100.0), CRS)
    map_html = make_webmap(stations=tables.stations_frame(stations),
                           segments=tables.segments_frame(dets, CRS),
                           sources=tables.sources_frame(rows, CRS), grid=grid,
                           title="Map " + HOSTILE)
    fig, ax = plt.subplots(figsize=(4, 2.5))
    ax.plot([0, 1, 2], [1, 3, 2])
    report_html = make_report(
        title="Report " + HOSTILE, survey_summary={"Survey": HOSTILE},
        sections=[{"heading": "Source " + HOSTILE, "text": HOSTILE, "figures": ["Profile"],
                   "tables": ["Parameters"]}],
        figures={"Profile": fig}, tables={"Parameters": source_parameter_table(rows[0])},
        provenance={"geosp_version": "0.1.0", "note": HOSTILE})
    plt.close(fig)
    paths = {"map": folder / "map.html", "report": folder / "report.html"}
    paths["map"].write_text(map_html, encoding="utf-8")
    paths["report"].write_text(report_html, encoding="utf-8")
    return paths


@pytest.fixture(scope="module")
def browser():
    with sync_api.sync_playwright() as pw:
        chromium = pw.chromium.launch(
            executable_path=CHROMIUM,
            args=["--no-sandbox", "--disable-gpu", "--disable-background-networking",
                  "--disable-component-update", "--no-first-run", "--disable-sync"])
        yield chromium
        chromium.close()


@pytest.fixture(scope="module")
def pages(tmp_path_factory):
    return build_pages(tmp_path_factory.mktemp("pages"))


def open_page(browser, path):
    page = browser.new_page(viewport={"width": 1200, "height": 800})
    record = {"requests": [], "errors": []}

    def route(r):
        url = r.request.url
        if url.startswith(("file:", "data:")):
            r.continue_()
        else:
            record["requests"].append(url)
            r.abort()

    page.route("**/*", route)
    page.on("console", lambda m: m.type == "error" and record["errors"].append(m.text))
    page.on("pageerror", lambda e: record["errors"].append(str(e)))
    page.on("request", lambda r: None if r.url.startswith(("file:", "data:"))
            else record["requests"].append(r.url))
    page.goto(path.as_uri())
    page.wait_for_load_state("load")
    page.wait_for_timeout(300)
    return page, record


COUNT_LAYERS = """() => {
  const maps = Object.values(window).filter(v => v instanceof L.Map);
  const counts = {maps: maps.length, circles: 0, polygons: 0, lines: 0, images: 0};
  maps[0].eachLayer(l => {
    if (l instanceof L.CircleMarker) counts.circles++;
    else if (l instanceof L.Polygon) counts.polygons++;
    else if (l instanceof L.Polyline) counts.lines++;
    else if (l instanceof L.ImageOverlay) counts.images++;
  });
  counts.overlays = document.querySelectorAll('.leaflet-control-layers-overlays label').length;
  counts.svgPaths = document.querySelectorAll('.leaflet-overlay-pane svg path').length;
  counts.scale = document.querySelectorAll('.leaflet-control-scale').length;
  return counts;
}"""

HOSTILE_POINT = """() => {
  const map = Object.values(window).find(v => v instanceof L.Map);
  let point = null;
  map.eachLayer(l => {
    if (l instanceof L.CircleMarker && l.feature &&
        l.feature.properties.Station.includes('__pwned')) {
      point = map.latLngToContainerPoint(l.getLatLng());
    }
  });
  const box = map.getContainer().getBoundingClientRect();
  return point && {x: point.x + box.left, y: point.y + box.top};
}"""


def test_map_renders_offline_with_expected_features(browser, pages):
    page, record = open_page(browser, pages["map"])
    counts = page.evaluate(COUNT_LAYERS)
    ARTIFACTS.mkdir(exist_ok=True)
    page.screenshot(path=str(ARTIFACTS / "map.png"))
    assert record["requests"] == []
    assert record["errors"] == []
    assert counts["maps"] == 1
    assert counts["circles"] == N_SIDE * N_SIDE
    # Each segment is drawn twice: its styled line and an invisible wider copy to click on.
    assert counts["lines"] == 4 and counts["polygons"] == 1 and counts["images"] == 1
    # One SVG path per vector feature (25 stations + 2 x 2 segment lines + 1 footprint).
    assert counts["svgPaths"] == N_SIDE * N_SIDE + 5
    assert counts["overlays"] == 4 and counts["scale"] == 1
    text = page.inner_text("#geosp-cautions")
    for caution in CAUTIONS:
        assert caution in text
    assert page.is_visible("#geosp-colourbar")
    # The title shows the hostile value as text.
    assert HOSTILE in page.inner_text("#geosp-title")
    page.close()


def test_map_popup_opens_and_hostile_value_is_inert(browser, pages):
    page, record = open_page(browser, pages["map"])
    point = page.evaluate(HOSTILE_POINT)
    assert point is not None
    page.mouse.move(point["x"], point["y"])
    page.wait_for_timeout(200)
    tooltip = page.inner_text(".leaflet-tooltip")
    assert HOSTILE in tooltip
    page.mouse.click(point["x"], point["y"])
    page.wait_for_selector(".leaflet-popup-content", timeout=3000)
    popup = page.inner_text(".leaflet-popup-content")
    assert HOSTILE in popup  # shown literally, as text
    assert "Residual (mV)" in popup
    assert page.evaluate("document.querySelectorAll('.leaflet-popup-content img').length") == 0
    assert page.evaluate("document.querySelectorAll('img[src=\"x\"]').length") == 0
    assert page.evaluate("typeof window.__pwned") == "undefined"
    assert record["requests"] == [] and record["errors"] == []
    page.close()


def test_report_renders_offline_and_inert(browser, pages):
    page, record = open_page(browser, pages["report"])
    assert record["requests"] == [] and record["errors"] == []
    assert page.evaluate("typeof window.__pwned") == "undefined"
    assert page.evaluate("document.querySelectorAll('img[src=\"x\"]').length") == 0
    # The one embedded figure decoded (a broken data URI has naturalWidth 0).
    widths = page.evaluate("Array.from(document.images).map(i => i.naturalWidth)")
    assert len(widths) == 1 and widths[0] > 0
    assert HOSTILE in page.inner_text("h1")
    assert "Parameters" in page.inner_text("body")
    page.close()


def test_map_of_50000_stations_opens_and_draws_a_sample_on_request(browser, tmp_path):
    """The thinned station layer starts off; ticked, it draws at most MAP_MAX_STATIONS circles on a canvas."""
    from geosp.webmap import MAP_MAX_STATIONS
    from tests.test_webmap import _many_stations

    path = tmp_path / "large.html"
    path.write_text(make_webmap(stations=_many_stations(), segments=None, sources=None, title="large"),
                    encoding="utf-8")
    page, record = open_page(browser, path)
    assert page.evaluate(COUNT_LAYERS)["circles"] == 0  # the layer starts unticked
    page.locator(".leaflet-control-layers-overlays label", has_text="Stations").click()
    page.wait_for_timeout(200)
    counts = page.evaluate(COUNT_LAYERS)
    assert 0.9 * MAP_MAX_STATIONS <= counts["circles"] <= MAP_MAX_STATIONS
    assert counts["svgPaths"] == 0  # drawn on a canvas, not as 4,600 SVG elements
    assert page.evaluate("document.querySelectorAll('.leaflet-overlay-pane canvas').length") >= 1
    assert record["requests"] == [] and record["errors"] == []
    page.close()
