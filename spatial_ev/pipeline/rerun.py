"""Rebuild a pilot :class:`~spatial_ev.pipeline.analysis.Analysis` from a run folder.

A run folder's ``manifest.json`` records the absolute path, SHA-256 and copy (``inputs/``) of
every input file and every analysis parameter including the seed. :func:`load_pilot` checks
each file (the recorded path first, then the folder's own copy, so a moved folder still
loads), refuses a file that is missing or whose checksum changed, reads the survey with the
options of the recorded command line and re-runs :func:`~spatial_ev.pipeline.analysis.analyse` with the recorded parameters,
so the rebuilt pilot is the analysis that wrote the folder.
"""

from __future__ import annotations

import inspect
import json
import os
from collections.abc import Callable
from dataclasses import replace
from pathlib import Path
from typing import Any

from spatial_ev.errors import DesignError, InputError
from spatial_ev.input.io import file_sha256
from spatial_ev.input.survey import read_survey
from spatial_ev.pipeline.analysis import Analysis, analyse

__all__ = ["load_pilot"]

_ROLES = ("sites", "species", "environment")


def _check_folder(folder: Any) -> tuple[Path, dict]:
    if not isinstance(folder, (str, os.PathLike)):
        raise InputError(f"`folder` must be the path of a run folder; got {type(folder).__name__}")
    folder = Path(folder)
    manifest = folder / "manifest.json"
    if not manifest.is_file():
        raise DesignError(f"{str(folder)!r} is not a run folder: it has no manifest.json "
                          "(give the folder written by `spatial-ev run` or `spatial-ev demo`)")
    try:
        record = json.loads(manifest.read_text(encoding="utf-8"))
    except (json.JSONDecodeError, UnicodeDecodeError) as exc:
        raise DesignError(f"{str(manifest)!r} is not valid JSON ({exc})") from None
    for key in ("inputs", "parameters"):
        if not isinstance(record.get(key), dict):
            raise DesignError(f"{str(manifest)!r} lacks the {key!r} record; the run folder "
                              "was not written by spatial_ev or is damaged")
    return folder, record


def _input_file(folder: Path, role: str, entry: dict) -> Path:
    """The recorded input file, else its copy in the run folder (``copy`` in the manifest,
    or ``inputs/<name>``), whichever still has the recorded SHA-256."""
    recorded = Path(entry.get("path", ""))
    expected = entry.get("sha256")
    candidates = [recorded]
    if isinstance(entry.get("copy"), str):
        candidates.append(folder / entry["copy"])
    candidates.append(folder / "inputs" / recorded.name)
    changed = None
    for path in candidates:
        if path.is_file():
            found = file_sha256(path)
            if found == expected:
                return path
            changed = (path, found)
    if changed is not None:
        path, found = changed
        raise DesignError(f"input file {str(path)!r} ({role}) has changed since the "
                          f"run: SHA-256 {found[:12]}… but the manifest records "
                          f"{str(expected)[:12]}…; restore the original file or "
                          "re-run the analysis")
    raise DesignError(f"input file {str(recorded)!r} ({role}) recorded in the manifest is "
                      f"missing (also not in {str(folder / 'inputs')!r}); restore it or "
                      "re-run the analysis")


def _read_options(folder: Path, parameters: dict) -> dict:
    """Survey-reading options as the run recorded them in its manifest."""
    if not isinstance(parameters.get("read_options"), dict):
        raise DesignError(f"the manifest of {str(folder)!r} does not record how the survey files "
                          "were read (a run folder from an older version); re-run the analysis "
                          "to rebuild it")
    return dict(parameters["read_options"])


def load_pilot(folder: str | os.PathLike, *,
               progress: Callable[[str], None] | None = None) -> Analysis:
    """Re-run the analysis recorded in a run folder, after checking its inputs.

    Parameters
    ----------
    folder : path
        A run folder (``manifest.json`` with inputs and parameters).
    progress : callable, optional
        Stage messages, passed to :func:`~spatial_ev.pipeline.analysis.analyse`.

    Returns
    -------
    Analysis
        Identical to the recorded run when the inputs and library versions are unchanged;
        ``notes`` says so when ``summary.json``'s fractions differ.

    Raises
    ------
    DesignError
        Not a run folder, an input missing or changed (SHA-256 differs).

    Examples
    --------
    >>> pilot = load_pilot("spatial-ev-demo")  # doctest: +SKIP
    """
    folder, record = _check_folder(folder)
    inputs = record["inputs"]
    if "sites" not in inputs or "species" not in inputs:
        raise DesignError(f"the manifest of {str(folder)!r} records no site or species file; "
                          "the pilot cannot be rebuilt")
    files = {role: _input_file(folder, role, inputs[role]) for role in _ROLES if role in inputs}
    p = record["parameters"]
    survey = read_survey(files["sites"], files["species"], files.get("environment"),
                         **{k: v for k, v in _read_options(folder, p).items() if v is not None})
    # every recorded parameter that analyse() takes (where the work runs is not recorded as
    # a choice: engine and scheduler keep their defaults)
    accepted = set(inspect.signature(analyse).parameters) - {"survey", "engine", "scheduler",
                                                             "progress"}
    missing = sorted({"transformation", "alpha", "n_permutations", "seed"} - set(p))
    if missing:
        raise DesignError(f"the manifest of {str(folder)!r} does not record {missing}; the "
                          "pilot cannot be rebuilt as it ran")
    result = analyse(survey, progress=progress,
                     **{k: v for k, v in p.items() if k in accepted})
    summary = folder / "summary.json"
    if summary.is_file() and result.fractions is not None:
        recorded = json.loads(summary.read_text(encoding="utf-8")).get("fractions") or {}
        if any(abs(recorded.get(k, v) - v) > 1e-6 for k, v in result.fractions.items()):
            # a frozen result: the note goes into a new instance, never set afterwards
            result = replace(result, notes=result.notes + (
                "The rebuilt pilot's fractions differ from the run folder's summary.json "
                "(the analysis code changed since the run?); the design uses the rebuilt "
                "pilot: " + ", ".join(f"{k} {recorded.get(k, float('nan')):.4f} → {v:.4f}"
                                      for k, v in result.fractions.items()) + ".",))
    return result
