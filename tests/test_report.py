"""Tests for geosp.report: self-contained, escaped interpretation report."""

import base64
import re

import matplotlib

matplotlib.use("Agg")
import matplotlib.pyplot as plt  # noqa: E402
import numpy as np  # noqa: E402
import pandas as pd  # noqa: E402
import pytest  # noqa: E402

from geosp.report import CAUTIONS, make_report, source_parameter_table  # noqa: E402

HOSTILE = "<img src=x onerror=alert(1)>"


def make_document(hostile=HOSTILE):
    fig, ax = plt.subplots(figsize=(3, 2))
    x = np.linspace(-200, 200, 41)
    ax.plot(x, 30 * np.tanh(x / 50), "k.", label="observed")
    ax.plot(x, 29 * np.tanh(x / 52), "r-", label="model")
    row = dict(source_id=hostile, top_depth_m=30.0, top_depth_lo_m=25.0, top_depth_hi_m=36.0,
               jump_mv=60.0, jump_lo_mv=50.0, jump_hi_mv=70.0, dip_deg=70.0,
               strike_deg=0.0, rms_mv=2.0, bic_gain=80.0)
    detections = pd.DataFrame({"fault_id": [hostile, "F2"], "score": [6.2, 0.9],
                               "detected": [1, 0], "note": [hostile, ""]})
    sections = [
        {"heading": "Survey and reduction QC", "text": "Loops close.\n\nDrift " + hostile},
        {"heading": "Detections", "tables": ["Fault segments"]},
        {"heading": f"Source {hostile}", "level": 3, "figures": ["Profile F1-1"],
         "tables": ["Parameters S1"], "text": ["Observed vs modelled.", "Flags: none."]},
    ]
    document = make_report(
        title="Prospect " + hostile,
        survey_summary={"Survey": hostile, "Stations": 41, "Working CRS": "EPSG:32633"},
        sections=sections, figures={"Profile F1-1": fig},
        tables={"Fault segments": detections, "Parameters S1": source_parameter_table(row)},
        cautions=CAUTIONS,
        provenance={"geosp_version": "0.1.0", "project": {"name": hostile},
                    "inputs": {"stations.csv": "sha256:00ff"}},
    )
    plt.close(fig)
    return document


def test_report_is_self_contained_and_escaped():
    document = make_document()
    assert document.startswith("<!DOCTYPE html>")
    assert HOSTILE not in document and "<img src=x" not in document
    assert "&lt;img src=x onerror=alert(1)&gt;" in document
    # No network loads: src/href only data: URIs or in-page anchors.
    for attr in re.findall(r"""\b(?:src|href)\s*=\s*["']([^"']*)""", document):
        assert attr.startswith(("data:", "#")), attr
    assert "@import" not in document and "url(" not in document


def test_report_embeds_figure_as_png_and_lists_sections():
    document = make_document("plain")
    images = re.findall(r'src="data:image/png;base64,([A-Za-z0-9+/=]+)"', document)
    assert len(images) == 1
    # PNG signature (PNG specification, section 5.2).
    assert base64.b64decode(images[0])[:8] == b"\x89PNG\r\n\x1a\n"
    for heading in ("Summary", "Survey and reduction QC", "Detections", "Source plain",
                    "Cautions", "Provenance"):
        assert heading in document
    for caution in CAUTIONS:
        assert document.count(caution) == 2  # in brief after the summary, and in full
    assert document.index("Summary") < document.index("Detections") < document.index(
        "Provenance")
    assert "<p>Loops close.</p><p>Drift plain</p>" in document


def test_parameter_table_has_percentile_ranges():
    table = source_parameter_table({"top_depth_m": 30.0, "top_depth_lo_m": 25.0,
                                    "top_depth_hi_m": 36.0, "jump_mv": 60.0,
                                    "dip_deg": float("nan")})
    assert table["parameter"].tolist() == ["Top depth", "Jump across patch"]
    assert table.loc[0, ["value", "p16", "p84"]].tolist() == [30.0, 25.0, 36.0]
    assert np.isnan(table.loc[1, "p16"])


def test_missing_figure_is_an_error():
    with pytest.raises(ValueError, match="nowhere"):
        make_report(title="t", survey_summary={}, sections=[{"heading": "a",
                    "figures": ["nowhere"]}], figures={}, tables={}, provenance={})
