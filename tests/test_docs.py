"""
The user documentation stays true to the code.

- docs/project-file.md and docs/commands.md equal what docs/make_reference.py
  generates now (so a new option or command cannot go undocumented);
- every stage option has a docstring description (the reference is built from
  it; a missing one names the option and the function that should document it);
- every layer field geosp writes is described in docs/outputs.md;
- every citation key used in the code or the docs is defined in
  docs/references.md;
- relative links between the pages point at files and anchors that exist;
- the `geosp check` output pasted in the tutorial is what geosp prints for the
  demo project.

The outside reference here is the code itself (signatures, docstrings, field
constants, the argparse parser) and a real `geosp check` run.
"""

from __future__ import annotations

import importlib.util
import inspect
import re
from pathlib import Path

import numpy as np
import pytest

ROOT = Path(__file__).resolve().parents[1]
DOCS = ROOT / "docs"
KEY = r"[A-Za-z]+[0-9]{4}[a-z]?"
# Pages owned by others that may not exist yet; links to them are checked once they do.
OTHERS = {"flow-modelling.md", "demo-results.md", "examples", "examples/"}


def _make_reference():
    spec = importlib.util.spec_from_file_location("make_reference", DOCS / "make_reference.py")
    module = importlib.util.module_from_spec(spec)
    spec.loader.exec_module(module)
    return module


@pytest.fixture(scope="module")
def ref():
    return _make_reference()


def _read(name):
    return (DOCS / name).read_text(encoding="utf-8")


# --------------------------------------------------------------------------
# Generated references


def test_generated_files_are_up_to_date(ref):
    for path, text in ref.outputs().items():
        assert path.exists(), f"{path.name} is missing: run python docs/make_reference.py"
        assert path.read_text(encoding="utf-8") == text, (
            f"{path.name} is out of date: run python docs/make_reference.py and commit the result")


def test_generation_is_deterministic(ref):
    first = ref.outputs()
    second = _make_reference().outputs()
    assert first == second


def test_every_stage_option_has_a_description(ref):
    missing = ref.missing_descriptions()
    assert not missing, "stage options without a docstring description: " + "; ".join(
        f"[{section}] {key} (document it in {owner})" for section, key, owner in missing)


def test_stage_functions_cover_every_stage_key(ref):
    """The functions whose docstrings are read own every key stage_defaults() reports."""
    from geosp.pipeline import stage_defaults

    defaults = stage_defaults()
    assert set(ref.STAGE_FUNCTIONS) == set(defaults)
    for section, keys in defaults.items():
        params = set()
        for spec in ref.STAGE_FUNCTIONS[section]:
            params |= set(inspect.signature(ref._load(spec)).parameters)
        assert set(keys) <= params, f"[{section}] keys not found in {ref.STAGE_FUNCTIONS[section]}"


def test_every_input_key_is_described(ref):
    from geosp.io.project import INPUT_SECTIONS

    for section, keys in INPUT_SECTIONS.items():
        assert section in ref.INPUT_HELP, f"[{section}] has no descriptions in make_reference.INPUT_HELP"
        undocumented = set(keys) - set(ref.INPUT_HELP[section])
        assert not undocumented, f"[{section}] keys without a description: {sorted(undocumented)}"
        assert not set(ref.INPUT_HELP[section]) - set(keys), f"[{section}] describes keys that do not exist"


def test_project_file_lists_every_key_with_its_default(ref):
    from geosp.io.project import INPUT_SECTIONS
    from geosp.pipeline import stage_defaults

    text = _read("project-file.md")
    for section, keys in {**INPUT_SECTIONS, **stage_defaults()}.items():
        body = text.split(f"## [{section}]\n", 1)[1].split("\n## ", 1)[0]
        for key, default in keys.items():
            rows = [line for line in body.splitlines() if line.startswith(f"| `{key}` |")]
            assert len(rows) == 1, f"[{section}] {key} is not listed once"
            if isinstance(default, (int, float)) and not isinstance(default, bool):
                # the default column shows the number itself (as TOML would)
                assert f"`{default}`" in rows[0] or f"`{float(default):.1f}`" in rows[0], rows[0]


def test_docstring_parser_on_a_known_docstring(ref):
    """The numpydoc parser handles grouped names, types, continuation lines and paragraphs."""

    def sample(*, a=1, b=2, c=3):
        """
        Summary.

        Parameters
        ----------
        a : int, optional
            First line
            second line.
        b, c : float
            Shared.

            Second paragraph.

        Returns
        -------
        None
        """

    params = ref.parse_parameters(sample)
    assert params["a"] == ("int, optional", "First line second line.")
    assert params["b"] == params["c"] == ("float", "Shared.\n\nSecond paragraph.")
    assert "None" not in params


def test_every_command_is_documented(ref):
    commands = _read("commands.md")
    tutorial = _read("tutorial.md")
    for name in ref.subcommands():
        assert f"### geosp {name}\n" in commands, name
        assert f"geosp {name}" in tutorial, f"the tutorial never mentions geosp {name}"
    for option in ("--workers", "--scheduler", "--quiet", "--debug", "--out", "--version"):
        assert option in commands, option


# --------------------------------------------------------------------------
# Outputs


def _documented_fields():
    text = _read("outputs.md")
    return set(re.findall(r"`([a-z][a-z0-9_]*)`", text))


def test_every_layer_field_is_documented():
    from geosp import tables
    from geosp.models import Stations

    constants = (tables.STATION_FIELDS + tables.STATION_EXTRAS + tables.SEGMENT_FIELDS
                 + tables.SEGMENT_EXTRAS + tables.SOURCE_FIELDS + tables.POLE_PAIR_FIELDS)
    # A tiny stations layer, built by the same function the pipeline uses.
    stations = Stations(station_id=["A", "B"], easting=[0.0, 25.0], northing=[0.0, 0.0],
                        upward=[100.0, 101.0], sp_mv=[1.0, 2.0], crs="EPSG:32633")
    built = [c for c in tables.stations_frame(stations).columns if c != "geometry"]
    documented = _documented_fields()
    missing = sorted((set(constants) | set(built)) - documented)
    assert not missing, f"fields missing from docs/outputs.md: {missing}"


def test_every_source_row_key_is_documented():
    """Keys the survey model puts in source rows (kept as extra columns) are all described."""
    from geosp.interpret import results
    from geosp.sources import buried_line, fault_patch, pole_pair

    keys = set()
    for func in (results.source_rows, results._patch_uncertainty, fault_patch.FaultPatch.row,
                 pole_pair.PolePair.row, buried_line.BuriedLine.row):
        source = inspect.getsource(func)
        keys |= set(re.findall(r'row\["([a-z][a-z0-9_]*)"\]\s*=', source))
        keys |= set(re.findall(r'^\s*"([a-z][a-z0-9_]*)":', source, flags=re.M))
        keys |= set(re.findall(r',\s*"([a-z][a-z0-9_]*)":', source))
        keys |= set(re.findall(r'\b([a-z][a-z0-9_]*)=(?:float|int|math|row|str|"|s\.)', source))
    keys -= {"invalid", "divide"}  # numpy error-state keywords, not fields
    assert len(keys) > 20, "could not read the source-row keys from geosp.interpret and geosp.sources"
    missing = sorted(keys - _documented_fields())
    assert not missing, f"source fields missing from docs/outputs.md: {missing}"


def test_outputs_lists_every_output_file():
    from geosp.io.atomic import OUTPUT_NAMES

    text = _read("outputs.md")
    for name in OUTPUT_NAMES + (".geosp/",):
        assert f"`{name}" in text, name


# --------------------------------------------------------------------------
# References and links


def _used_keys():
    used = {}
    for path in list((ROOT / "geosp").rglob("*.py")) + list(DOCS.rglob("*.md")) + list(DOCS.rglob("*.py")):
        text = path.read_text(encoding="utf-8", errors="replace")
        for key in re.findall(rf"\[({KEY})\]_", text):
            used.setdefault(key, path.relative_to(ROOT))
        if path.suffix == ".md":
            for key in re.findall(rf"references\.md#({KEY})\b", text):
                used.setdefault(key, path.relative_to(ROOT))
    return used


def test_every_cited_key_is_defined():
    text = _read("references.md")
    defined = set(re.findall(rf'<a id="({KEY})"></a>\*\*\[\1\]\*\*', text))
    used = _used_keys()
    assert {"Telford1990", "Kellogg1929"} <= set(used), "the key scan found too little"
    missing = {k: str(p) for k, p in used.items() if k not in defined}
    assert not missing, f"keys cited but not defined in docs/references.md: {missing}"


def _slug(heading):
    text = re.sub(r"[^\w\- ]", "", heading.strip().lower())
    return text.replace(" ", "-")


def _anchors(path):
    text = path.read_text(encoding="utf-8")
    text_no_code = re.sub(r"```.*?```", "", text, flags=re.S)
    anchors = {_slug(h) for h in re.findall(r"^#+ (.+)$", text_no_code, flags=re.M)}
    anchors |= set(re.findall(r'<a id="([^"]+)"', text))
    return anchors


def test_relative_links_resolve():
    problems = []
    for page in sorted(DOCS.glob("*.md")):
        text = re.sub(r"```.*?```", "", page.read_text(encoding="utf-8"), flags=re.S)
        for target in re.findall(r"\]\(([^)\s]+)\)", text):
            if re.match(r"[a-z]+://", target):
                continue
            file_part, _, anchor = target.partition("#")
            dest = page if not file_part else (page.parent / file_part).resolve()
            if file_part in OTHERS and not dest.exists():
                continue
            if not dest.exists():
                problems.append(f"{page.name}: {target} (no such file)")
            elif anchor and dest.suffix == ".md" and anchor not in _anchors(dest):
                problems.append(f"{page.name}: {target} (no such anchor)")
    assert not problems, "broken links:\n" + "\n".join(problems)


def test_index_links_every_page():
    index = _read("index.md")
    for page in DOCS.glob("*.md"):
        if page.name != "index.md":
            assert f"({page.name}" in index, f"index.md does not link {page.name}"


# --------------------------------------------------------------------------
# Pasted output


def test_tutorial_check_output_is_real():
    """The `geosp check` block in the tutorial is what geosp prints for the demo project."""
    from geosp import pipeline

    project = ROOT / "demo_area" / "project.toml"
    _, summary = pipeline.check(pipeline.load_project(project))
    tutorial = _read("tutorial.md")
    for line in pipeline.format_summary(summary).splitlines():
        assert f"    {line}\n" in tutorial, f"tutorial's geosp check output differs: {line!r}"


def test_pole_pair_formula_in_outputs_matches_physics():
    """outputs.md states V = pole_k_mv_m·(1/r+ − 1/r−); check it against sources_sp."""
    from geosp.physics.forward import sources_sp

    row = {"model": "pole_pair", "top_x": 0.0, "top_y": 0.0, "top_depth_m": 20.0,
           "neg_x": 100.0, "neg_y": 0.0, "neg_depth_m": 30.0, "pole_k_mv_m": 500.0}
    x = np.array([-50.0, 10.0, 300.0])
    y = np.array([5.0, -20.0, 40.0])
    r_pos = np.sqrt(x ** 2 + y ** 2 + 20.0 ** 2)
    r_neg = np.sqrt((x - 100.0) ** 2 + y ** 2 + 30.0 ** 2)
    expected = 500.0 * (1 / r_pos - 1 / r_neg)  # point poles on a half-space [Telford1990]_
    # closed form against closed form: round-off only
    np.testing.assert_allclose(sources_sp((x, y), [row]), expected, rtol=1e-10)
    assert "`pole_k_mv_m` · (1/r₊ − 1/r₋)" in _read("outputs.md")


def test_buried_line_formula_in_outputs_matches_physics():
    """outputs.md states V = line_k_mv·∫ ds / R; check it against sources_sp by quadrature."""
    from scipy import integrate

    from geosp.physics.forward import sources_sp

    row = {"model": "buried_line", "top_x": 100.0, "top_y": -40.0, "strike_deg": 70.0,
           "length_m": 900.0, "top_depth_m": 3.0, "line_k_mv": -8.0}
    x = np.array([-50.0, 120.0, 700.0])
    y = np.array([5.0, -20.0, 40.0])
    phi = np.radians(70.0)

    def integral(xi, yi):
        def inverse_r(s):
            return 1.0 / np.sqrt((100.0 + s * np.sin(phi) - xi) ** 2 + (-40.0 + s * np.cos(phi) - yi) ** 2 + 9.0)
        return integrate.quad(inverse_r, -450.0, 450.0, limit=400, epsabs=1e-12, epsrel=1e-10)[0]

    expected = -8.0 * np.array([integral(a, b) for a, b in zip(x, y)])  # the pole potential integrated
    np.testing.assert_allclose(sources_sp((x, y), [row]), expected, rtol=1e-8)
    assert "`line_k_mv` · ∫ ds / R" in _read("outputs.md")


def test_readme_quotes_the_accuracy_page():
    """The README's headline figures are the ones docs/accuracy.md measured (regenerated by the benchmark)."""
    import re

    page = (DOCS / "accuracy.md").read_text(encoding="utf-8")
    readme = (ROOT / "README.md").read_text(encoding="utf-8")

    def row(text, label):
        line = next(x for x in text.splitlines() if x.startswith(f"| {label}"))
        return re.findall(r"\d+\.\d+", line)

    recall = row(page, "recall")
    assert row(readme, "planted patches found (recall)") == [recall[0], recall[1]]
    precision = row(page, "precision")
    assert row(readme, "reported fault patches that are real (precision)") == [precision[0], precision[1]]
    top = row(page, "median \\|error\\| / Cramér–Rao σ, top depth")
    assert row(readme, "median top-depth error / best achievable") == [top[0], top[2]]
    cover = row(page, "16–84 % interval contains the true top depth")
    assert row(readme, "16–84 % top-depth intervals containing the truth")[:2] == cover
