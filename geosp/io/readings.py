"""Read raw gradient (dipole) readings and electrode checks from CSV files."""

from __future__ import annotations

from pathlib import Path

import numpy as np
import pandas as pd

from ..errors import InputError, InputErrors, format_rows
from ..models import ElectrodeChecks, Readings
from .stations import MAX_ABS_SP_MV, _missing_columns, parse_times, read_csv_text, refuse_outside


def _read_csv(path, what):
    path = Path(path)
    if not path.exists():
        raise InputError(path, f"the {what} file does not exist.", "Check the path in [readings].")
    if path.suffix.lower() not in (".csv", ".txt"):
        raise InputError(path, f"unsupported {what} format '{path.suffix}'.", "Save it as a CSV file.")
    frame = read_csv_text(path)
    if len(frame) == 0:
        raise InputError(path, f"has a header but no {what} rows.", "Add the rows or remove the file from [readings].")
    return frame


def _times(frame, column, path, problems):
    raw = frame[column]
    times = parse_times(raw, path, column, lambda mask: [f"line {i + 2}" for i in np.flatnonzero(mask)], problems)
    bad = times.isna()
    if bad.any():
        rows = [f"line {i + 2}" for i in np.flatnonzero(bad.to_numpy())]
        problems.append(InputError(path, f"column '{column}' is blank or not an ISO 8601 time at {format_rows(rows)}.",
                                   "Write times like 2026-03-14T09:30:00."))
    return times.to_numpy(dtype="datetime64[s]")


def _values(frame, column, path, problems):
    raw = frame[column]
    values = pd.to_numeric(raw, errors="coerce").to_numpy(dtype=float)
    bad = ~np.isfinite(values)
    if bad.any():
        rows = [f"line {i + 2}" for i in np.flatnonzero(bad)]
        problems.append(InputError(path, f"column '{column}' is blank or not a number at {format_rows(rows)}.",
                                   "Enter the reading in mV or delete the row; blanks are never read as 0."))
    return values


def read_readings(config):
    """
    Read the [readings] CSV.

    Returns
    -------
    readings : Readings
        ``dv_mv`` = potential at ``to`` minus potential at ``from``, as read.
    """
    path = Path(config["path"])
    frame = _read_csv(path, "readings")
    wanted = [(k, config[k]) for k in ("line", "from", "to", "time", "value_mv")]
    missing = _missing_columns(path, list(frame.columns), wanted)
    if missing:
        raise InputErrors(missing)
    problems = []
    time = _times(frame, config["time"], path, problems)
    dv = _values(frame, config["value_mv"], path, problems)
    refuse_outside(dv, -MAX_ABS_SP_MV, MAX_ABS_SP_MV, path, config["value_mv"],
                   lambda mask: [f"line {i + 2}" for i in np.flatnonzero(mask)], problems,
                   "That is no potential difference between two electrodes (mV): check the units and the row.")
    ids = {k: frame[config[k]].fillna("").astype(str).str.strip().to_numpy().astype(object) for k in ("line", "from", "to")}
    for key in ("from", "to"):
        blank = ids[key] == ""
        if blank.any():
            problems.append(InputError(path, f"column '{config[key]}' is blank at "
                                       f"{format_rows([f'line {i + 2}' for i in np.flatnonzero(blank)])}.",
                                       "Every reading needs both station ids."))
    same = (ids["from"] == ids["to"]) & (ids["from"] != "")
    if same.any():
        problems.append(InputError(path, f"a reading goes from a station to itself at "
                                   f"{format_rows([f'line {i + 2}' for i in np.flatnonzero(same)])}.",
                                   "Correct the from/to station ids."))
    if problems:
        raise InputErrors(problems)
    return Readings(line_id=ids["line"], from_id=ids["from"], to_id=ids["to"], time=time, dv_mv=dv,
                    source_row=np.arange(2, len(frame) + 2), path=str(path))


def read_electrode_checks(config):
    """Read the electrode-check CSV named by [readings] electrode_checks."""
    path = Path(config["electrode_checks"])
    frame = _read_csv(path, "electrode checks")
    wanted = [("checks_time", config.get("checks_time") or "time"),
              ("checks_offset_mv", config.get("checks_offset_mv") or "offset_mv")]
    missing = _missing_columns(path, list(frame.columns), wanted)
    if missing:
        raise InputErrors(missing)
    problems = []
    time = _times(frame, wanted[0][1], path, problems)
    offset = _values(frame, wanted[1][1], path, problems)
    if problems:
        raise InputErrors(problems)
    order = np.argsort(time, kind="stable")
    return ElectrodeChecks(time=time[order], offset_mv=offset[order],
                           source_row=np.arange(2, len(frame) + 2)[order], path=str(path))
