"""The text of docs/accuracy.md around the measured table (written by bench_recovery.py --doc)."""

from __future__ import annotations

from datetime import date


def accuracy_page(table, *, n, seed0, command, floor_rule, ranges):
    """
    Markdown of the accuracy page.

    Parameters
    ----------
    table : str
        The measured table (markdown), reduced input and raw readings side by side.
    n, seed0 : int
        Surveys per mode and the first seed.
    command : str
        The command that regenerates the page.
    floor_rule : str
        The detectability floor, in words.
    ranges : str
        The generator's ranges (markdown list).
    """
    return f"""# Accuracy: how often geosp finds the right sources

This page is written by the recovery benchmark; do not edit the numbers by hand. Regenerate it
with

    {command}

({n} surveys per mode, seeds {seed0} to {seed0 + n - 1}, run two at a time on two cores; the time
each survey took is in the last rows of the table; measured {date.today().isoformat()}).

## What is measured

The benchmark draws synthetic surveys at random from a generator of varied designs, writes each
one as the files a field geophysicist would bring (stations, fault traces, a DEM and, for raw
input, the leapfrog readings with their electrode checks), runs `geosp run` on it with
**default settings** (the project file names only the inputs) and compares the `sources` layer
with what was planted. geosp never sees the generator: the planted SP comes from an independent
discretisation of the same physics (each patch cut into small triangles whose solid angles are
summed, with the mirror image of the ground surface), not from geosp's closed forms.

The generator's ranges, drawn afresh for every survey:

{ranges}

**Detectability floor.** {floor_rule} Patches below the floor are planted too; finding one
counts as a correct source but not toward recall, missing one is not counted against it.

**Scores.**

- *Recall*: planted patches above the floor that a reported `fault_patch` found (same fault,
  along-trace extents overlapping by at least 30 % of the shorter one, or the reported centre
  inside the planted extent; each planted patch is found by at most one source).
- *Precision*: reported `fault_patch` sources that found a planted patch, over all reported
  `fault_patch` sources. Every false source is classed: a duplicate of a found patch, at a
  cultural source (within 400 m of a pipeline or casing pole), on a source-free fault, or
  elsewhere. `pole_pair` and `buried_line` rows (geosp's own "cultural or near-surface") are not claims of a
  fault source.
- *Targets*: the same two figures counting only the sources geosp reports with `status` =
  `target` (those it draws as uncertain left out, on either side of the count).
- *Errors*: the top depth and the geometric-mean depth √(top·bottom) of each found patch,
  compared as elevations (a reported depth refers to the reported `ground_m`).
- *Cramér–Rao σ*: the best standard deviation any unbiased estimator can reach on that survey's
  stations and noise, from the Fisher information of the generator's own forward model (station
  noise: white plus the correlated part; gross outliers and reading errors left out, so it is a
  floor). "Alone" frees the patch's own parameters and the survey-wide nuisances (constant,
  quadratic regional, terrain coefficient); "joint" frees every planted source as well.
- *Coverage*: how often the reported 16–84 % interval of the top depth (`top_depth_lo_m`,
  `top_depth_hi_m`) and the reported ±1σ of √(top·bottom) (`geo_mean_depth_sd_m`) contain the
  truth. A calibrated interval does so 68 % of the time.
- *Terrain*: the share of surveys whose true terrain coefficient lies within 2 reported σ of the
  one geosp used (`terrain` in run.json).

## Measured

{table}

Read these as the behaviour of geosp on surveys like the generator's, not as a promise for a
given field survey: SP interpretation is non-unique, the sources are models, and a drilling
decision belongs to licensed professionals under local regulations.

## Earlier measurements (a record; not regenerated)

The same benchmark (40 surveys per mode) on earlier code, for comparison (targets-only precision
was not scored before the survey-wide model):

| figure | before the survey-wide model: reduced / raw | survey-wide model, before unchecked line-end readings: reduced / raw | with them, before the buried-line rival: reduced / raw |
|---|---|---|---|
| recall | 0.59 / 0.50 | 0.96 / 0.95 | 0.96 / 0.95 |
| precision (targets only) | 0.66 / 0.82 | 0.80 (0.89) / 0.61 (0.82) | 0.80 (0.89) / 0.62 (0.86) |
| median \|error\| / Cramér–Rao σ, top (joint) | 2.1 / 2.0 | 1.1 (1.1) / 1.7 (1.6) | 1.1 (1.1) / 1.7 (1.5) |
| median \|error\| / Cramér–Rao σ, √(top·bottom) (joint) | 3.1 / 2.8 | 1.6 (1.3) / 2.1 (1.8) | 1.6 (1.3) / 2.0 (1.6) |
| 16–84 % coverage, top / √(top·bottom) | 0.26, 0.39 / 0.38, 0.62 | 0.70, 0.61 / 0.64, 0.53 | 0.70, 0.61 / 0.68, 0.58 |
| terrain within 2 reported σ | 0.23 / 0.15 | 0.82 / 0.82 | 0.82 / 0.78 |
"""
