"""Tests for geosp.webmap: offline, escaped, complete web map."""

import re

import numpy as np
import pytest

from geosp import tables
from geosp.models import Detection, FaultSegment, Raster, Stations
from geosp.webmap import CAUTIONS, check_offline, make_webmap

CRS = "EPSG:32633"
HOSTILE = "<img src=x onerror=alert(1)>"


def make_inputs(hostile=HOSTILE):
    e = 500000.0 + np.arange(0.0, 500.0, 100.0)
    n = 4000000.0 + np.arange(0.0, 500.0, 100.0)
    east, north = np.meshgrid(e, n)
    sp = 30.0 * np.tanh((east - 500250.0) / 100.0)
    ids = [f"S{i:03d}" for i in range(east.size)]
    ids[0] = hostile
    stations = Stations(station_id=ids, easting=east.ravel(), northing=north.ravel(),
                        upward=np.zeros(east.size), sp_mv=sp.ravel(), crs=CRS,
                        flag=[hostile] + [""] * (east.size - 1))
    seg = FaultSegment(hostile, "F1-1", np.array([[500250.0, 4000000.0], [500250.0, 4000400.0]]),
                       0.0, 400.0)
    dets = [Detection(seg, np.arange(5), 25, 6.2, 1, True, 3.0, 2.0, {}, note=hostile)]
    rows = [dict(source_id="S1", fault_id=hostile, segment_id="F1-1", model="fault_patch",
                 top_x=500250.0, top_y=4000200.0, strike_deg=0.0, dip_deg=70.0,
                 dip_dir_deg=90.0, top_depth_m=30.0, bottom_depth_m=200.0, length_m=300.0,
                 jump_mv=60.0, top_depth_lo_m=25.0, top_depth_hi_m=36.0, jump_lo_mv=50.0,
                 jump_hi_mv=70.0, rms_mv=2.0, chi2_red=1.05, n_stations=25, bic_gain=80.0,
                 sigma_ratio=1.0, flags=hostile)]
    ge = 500000.0 + np.arange(0.0, 500.0, 25.0)
    gn = 4000000.0 + np.arange(0.0, 500.0, 25.0)
    gee, _ = np.meshgrid(ge, gn)
    values = 30.0 * np.tanh((gee - 500250.0) / 100.0)
    values[:3, :3] = np.nan
    return dict(stations=tables.stations_frame(stations),
                segments=tables.segments_frame(dets, CRS),
                sources=tables.sources_frame(rows, CRS),
                grid=Raster(ge, gn, values, CRS))


# Anything that makes a browser fetch: src/href/data attributes, CSS url() and
# @import with an absolute or protocol-relative URL (HTML and CSS specs).
LOADS = re.compile(r"""(?:\b(?:src|href|data)\s*=\s*["']?\s*(?:https?:)?//)"""
                   r"""|url\(\s*["']?\s*(?:https?:)?//|@import""", re.I)


@pytest.fixture(scope="module")
def document():
    return make_webmap(**make_inputs(), title="Prospect " + HOSTILE)


def test_map_loads_nothing_from_the_network(document):
    # Every loading reference must be absent except Leaflet's own attribution
    # anchor (<a href="https://leafletjs.com">), a link that loads nothing.
    offending = [m for m in LOADS.finditer(document)
                 if not document[document.rfind("<", 0, m.start()):].startswith("<a ")]
    assert offending == []
    urls = set(re.findall(r"https?://[^\s\"'<>)]+", document))
    # Remaining URLs are XML namespace names, code comments or that anchor.
    allowed = {"http://www.w3.org/2000/svg", "https://leafletjs.com",
               "https://bugzilla.mozilla.org/show_bug.cgi?id=888319"}
    assert urls <= allowed, urls - allowed
    assert "<script src" not in document and "<link" not in document


def test_hostile_values_are_escaped_everywhere(document):
    # The raw tag must appear nowhere: not in title, popups (JSON), tooltips.
    assert HOSTILE not in document
    assert "<img src=x" not in document
    # ...and it is still shown, escaped, in the title and caption.
    assert "<title>Prospect &lt;img src=x onerror=alert(1)&gt;</title>" in document
    assert "Prospect &lt;img src=x onerror=alert(1)&gt;" in document


def test_map_has_layers_cautions_scale_and_colour_bar(document):
    for label in ("SP grid (mV)", "Stations (SP)", "Fault segments (detection)",
                  "Source footprints (models)"):
        assert label in document
    for caution in CAUTIONS:
        assert caution in document
    assert "L.control.scale" in document
    assert 'id="geosp-colourbar"' in document and "linear-gradient" in document
    assert "L.control.layers" in document
    # The grid overlay is an inline PNG, not a file or URL.
    assert re.search(r'L\.imageOverlay\(\s*"data:image/png;base64,', document)
    # Popup content carries the 16-84 % ranges of the source parameters.
    assert "30.0 (25.0 to 36.0)" in document and "60.0 (50.0 to 70.0)" in document


def test_check_offline_rejects_cdn_links():
    with pytest.raises(RuntimeError, match="network"):
        check_offline('<script src="https://cdn.example.invalid/leaflet.js"></script>')
    with pytest.raises(RuntimeError):
        check_offline("<style>.a{background:url(//example.invalid/x.png)}</style>")
    check_offline('<a href="https://example.invalid">a link</a>')


# Template syntax in user text. folium renders a layer's script and compiles the
# result again as a Jinja template (branca's MacroElement), so an id that reads
# "{{ 7*7 }}" would come out as 49, "{% raw %}" would stop the page being
# built, and an expression reaching Python objects would run on the machine.
TEMPLATE_IDS = ("A{{7*7}}B", "{%raw%}C", "D{#E", "F{{ self.__init__ }}",
                "@import 'http://evil.example.invalid/x.css';")


def test_template_syntax_in_user_text_is_never_evaluated():
    inputs = make_inputs(TEMPLATE_IDS[0])
    stations = inputs["stations"]
    for k, text in enumerate(TEMPLATE_IDS):
        stations.loc[k, "station_id"] = text
        stations.loc[k, "line_id"] = text
    inputs["segments"].loc[0, "segment_id"] = TEMPLATE_IDS[1]
    inputs["sources"].loc[0, "flags"] = TEMPLATE_IDS[2]
    document = make_webmap(**inputs, title=" ".join(TEMPLATE_IDS),
                           tiles_attribution=TEMPLATE_IDS[3])
    # Evaluated, {{7*7}} gives "A49B" and {{ self.__init__ }} a bound-method repr.
    assert "A49B" not in document and "bound method" not in document
    # No template syntax survives in the page at all: every brace of user
    # text is a character reference (shown as a brace by the browser).
    assert "A&#123;&#123;7*7&#125;&#125;B" in document  # in the title
    # in the layers' JSON, where the page's JSON encoder writes & as \u0026
    assert "A\\u0026#123;\\u0026#123;7*7\\u0026#125;\\u0026#125;B" in document
    # Leaflet and geosp's own page code contain no template openers, so any
    # in the page would have come from user text.
    for opener in ("{{", "{%", "{#"):
        assert opener not in document
    # The escaped @import is text in a popup and the title, not a stylesheet,
    # so the offline guard lets the map be written.
    assert "@import &#x27;http://evil.example.invalid/x.css&#x27;" in document


def test_tile_url_with_template_syntax_is_refused():
    inputs = make_inputs("plain")
    with pytest.raises(ValueError, match="single braces"):
        make_webmap(**inputs, tiles="https://tiles.example.invalid/{{7*7}}/{x}/{y}.png")


def test_check_offline_looks_at_resources_not_text():
    # Loads: an @import or remote url() in a <style> element or style
    # attribute, a remote src/srcset/data, an iframe (HTML and CSS specs).
    for page in ('<style>@import "local.css";</style>',
                 '<div style="background:url(https://example.invalid/a.png)">x</div>',
                 '<img srcset="a.png 1x, https://example.invalid/b.png 2x">',
                 '<object data="//example.invalid/x.swf"></object>',
                 '<iframe src="http://example.invalid/"></iframe>'):
        with pytest.raises(RuntimeError, match="network"):
            check_offline(page)
    # Text, escaped text and script strings load nothing.
    for page in ("<p>@import 'http://example.invalid/x.css';</p>",
                 "<div>url(http://example.invalid/a.png)</div>",
                 '<script>var t = "https://tiles.example.invalid/{z}/{x}/{y}.png";</script>',
                 '<img src="data:image/png;base64,AAAA">'):
        check_offline(page)


def test_user_tiles_are_the_only_remote_reference():
    inputs = make_inputs("plain")
    inputs.pop("grid")
    document = make_webmap(**inputs, tiles="https://tiles.example.invalid/{z}/{x}/{y}.png",
                           tiles_attribution="Example <b>tiles</b>")
    assert "https://tiles.example.invalid/{z}/{x}/{y}.png" in document
    assert "Example &lt;b&gt;tiles&lt;/b&gt;" in document or "Example \\u0026lt;b" in document
    assert "SP grid (mV)" not in document


def test_empty_layers_still_render():
    inputs = make_inputs("plain")
    empty = dict(stations=inputs["stations"].iloc[:0], segments=inputs["segments"].iloc[:0],
                 sources=tables.sources_frame([], CRS), grid=None)
    document = make_webmap(**empty)
    assert "Stations (SP)" in document and CAUTIONS[0] in document


def test_grid_overlay_is_web_mercator_and_covers_the_grid():
    from matplotlib import colormaps
    from pyproj import Transformer

    from geosp.webmap import _grid_overlay

    grid = make_inputs()["grid"]
    image, ((lat0, lon0), (lat1, lon1)) = _grid_overlay(grid, colormaps["RdBu_r"], 50.0)
    # Independent reference: the grid's outer cell edges projected with pyproj
    # (always_xy). The warped image must cover them to within half a cell
    # (12.5 m: 1.1e-4 degrees of latitude, 1.4e-4 of longitude at 36 N), the
    # rounding of rasterio's default output grid to whole pixels; and its
    # extent may exceed them by at most about two cells (5e-4 degrees).
    to_wgs = Transformer.from_crs(CRS, "EPSG:4326", always_xy=True)
    xs = [grid.easting[0] - 12.5, grid.easting[-1] + 12.5]
    ys = [grid.northing[0] - 12.5, grid.northing[-1] + 12.5]
    lon, lat = to_wgs.transform([xs[0], xs[1], xs[0], xs[1]], [ys[0], ys[0], ys[1], ys[1]])
    assert lon0 <= min(lon) + 1.4e-4 and lon1 >= max(lon) - 1.4e-4
    assert lat0 <= min(lat) + 1.1e-4 and lat1 >= max(lat) - 1.1e-4
    assert lon1 - max(lon) < 5e-4 and min(lat) - lat0 < 5e-4
    assert image.dtype == np.uint8 and image.shape[2] == 4
    # The NaN block sits in the south-west corner: transparent there (north-up
    # image, so the last rows), opaque in the north-east.
    assert image[-2, 1, 3] == 0 and image[1, -2, 3] == 255
    # West side is negative SP (blue), east side positive (red) on RdBu_r.
    west, east = image[image.shape[0] // 2, 3], image[image.shape[0] // 2, -3]
    assert west[2] > west[0] and east[0] > east[2]


def _many_stations(n_lines=100, per_line=500):
    """A 50,000-station survey on north-south lines; every 997th station flagged."""
    e = 500000.0 + np.repeat(np.arange(n_lines) * 80.0, per_line)
    n = 4000000.0 + np.tile(np.arange(per_line) * 20.0, n_lines)
    ids = [f"L{i // per_line:03d}-{i % per_line:03d}" for i in range(e.size)]
    st = Stations(station_id=ids, easting=e, northing=n, upward=np.zeros(e.size),
                  sp_mv=30.0 * np.sin(e / 700.0), crs=CRS, line_id=[i[:4] for i in ids],
                  flag=["outlier" if i % 997 == 0 else "" for i in range(e.size)])
    return tables.stations_frame(st)


def test_large_survey_map_draws_a_thinned_sample_keeping_flagged_stations():
    from geosp.webmap import MAP_MAX_STATIONS, thin_stations

    frame = _many_stations()
    thinned, note = thin_stations(frame)
    assert len(thinned) <= MAP_MAX_STATIONS
    assert set(frame.index[frame["flag"] != ""]) <= set(thinned.index)  # every flagged station drawn
    # The sample is even along the lines: the gaps between drawn stations of one line are equal.
    line = thinned[thinned["line_id"] == "L050"].index.to_numpy()
    gaps = np.diff(line)
    assert len(set(gaps[(gaps > 1) & (gaps < 20)].tolist())) <= 2
    assert f"{len(thinned):,} of 50,000 drawn" in note
    small = frame.iloc[:300]
    got, none = thin_stations(small)
    assert got is small and none is None


def test_large_survey_map_stays_small_and_starts_with_the_stations_off():
    document = make_webmap(stations=_many_stations(), segments=None, sources=None, title="large")
    assert len(document) < 5e6
    assert "of 50,000 drawn" in document
    assert "Tick “Stations (SP)” in the layer list" in document
    check_offline(document)


def test_false_alarm_probability_at_the_simulation_floor_reads_as_a_bound():
    from geosp.webmap import _probability

    assert _probability(1 / 1001) == "< 0.001"  # no simulated survey scored as high: a bound, not a value
    assert _probability(0.0123) == "0.012"
    assert _probability(float("nan")) == "–" and _probability(None) == "–"


def test_source_popup_reads_as_words_with_position_and_elevation():
    from geosp.webmap import _flag_words, _source_properties

    words = _flag_words("bound:dip_deg; corr:top_depth_m/strength; terrain")
    assert words == "dip at its limit (not resolved); top depth and strength trade off; uneven ground above the source"
    row = dict(source_id="S1", model="fault_patch", status="target", top_x=500250.4, top_y=4000200.0,
               top_depth_m=130.0, ground_m=1030.0, geo_mean_depth_m=300.0, geo_mean_depth_sd_m=12.0,
               strike_deg=10.0, dip_deg=70.0, dip_dir_deg=100.0, flags="")
    props = _source_properties(row)
    assert props["Top edge centre E / N (m)"] == "500250 / 4000200"
    assert props["Top elevation (m above sea level)"] == "900"  # 1030 m ground − 130 m depth
    assert props["√(top·bottom) depth (m, best resolved)"] == "300 ± 12"
    assert props["Strike / dip / dip direction (°)"] == "10 / 70 / 100"


def test_map_has_a_legend_for_faults_and_sources(document):
    legend = document[document.index('id="geosp-legend"'):]
    for text in ("fault segment with a source", "marginal: worth a second look", "no anomaly detected",
                 "uncertain source: not a target", "likely cultural"):
        assert text in legend


def test_fixed_sp_range_makes_maps_comparable():
    """With sp_range_mv the colour bar ends at ±that value whatever the data (auto follows the data)."""
    inputs = make_inputs()
    auto = make_webmap(**inputs)
    fixed = make_webmap(**inputs, sp_range_mv=150)
    bar = lambda doc: doc[doc.index('id="geosp-colourbar"'):doc.index('id="geosp-colourbar"') + 2500]  # noqa: E731
    assert ">150<" in bar(fixed) and ">-150<" in bar(fixed)
    assert ">150<" not in bar(auto)


def test_hillshade_lights_slopes_facing_the_sun():
    # Reference: Lambert's cosine law with the sun from the north-west, 45° up (the usual
    # cartographic choice). Flat ground: sin 45°. A 45° slope facing the sun squarely: 1.
    # The opposite slope: in the shadow, 0.
    from geosp.webmap import hillshade

    east, north = np.meshgrid(np.arange(50.0), np.arange(40.0))  # 1 m cells, row 0 south
    flat = hillshade(np.zeros_like(east), 1.0, 1.0)
    assert np.allclose(flat, np.sqrt(0.5))
    facing = -(north - east) / np.sqrt(2.0)  # falls toward the north-west by 1 m per m
    assert np.allclose(hillshade(facing, 1.0, 1.0), 1.0)
    assert np.allclose(hillshade(-facing, 1.0, 1.0), 0.0)


def test_map_draws_the_relief_when_given_a_dem():
    inputs = make_inputs()
    e = 500000.0 + np.arange(-100.0, 600.0, 10.0)
    n = 4000000.0 + np.arange(-100.0, 600.0, 10.0)
    ee, nn = np.meshgrid(e, n)
    dem = Raster(e, n, 300.0 + 0.1 * (ee - 500000.0) + 20.0 * np.sin(nn / 80.0), CRS, units="m")
    document = make_webmap(**inputs, dem=dem)
    assert "Relief (shaded from the DEM)" in document
    # Over the stations (plus a 10 % margin) the DEM spans under 100 m: contours every 10 m (a round
    # interval giving about ten levels), off by default.
    assert "Elevation contours (10 m)" in document and "m above sea level" in document
    assert "Relief (shaded" not in make_webmap(**inputs)
    check_offline(document)


def test_printable_map_has_the_grid_decisions_outlines_and_cautions():
    import io

    from geosp.figures.printable import printable_map

    inputs = make_inputs()
    fig = printable_map(inputs["grid"], inputs["segments"], inputs["sources"], title="T",
                        cautions=CAUTIONS, amplitude=40.0, note="Coordinates in EPSG:32633.")
    ax = fig.axes[0]
    labels = [t.get_text() for t in ax.get_legend().get_texts()]
    assert "fault segment with a source" in labels and "uncertain source: not a target" in labels
    image = ax.get_images()[0]
    assert image.norm.vmin == -40.0 and image.norm.vmax == 40.0  # the web map's colour range
    text = " ".join(t.get_text() for t in fig.texts)
    assert all(c in text for c in CAUTIONS)
    buffer = io.BytesIO()
    fig.savefig(buffer, format="pdf")
    assert buffer.getvalue().startswith(b"%PDF")
