"""Write a whole-analysis run folder: summary, manifest, tables, figures, maps and report.

Layout of a run folder::

    summary.json      machine-readable results (the public contract)
    manifest.json     versions, inputs' SHA-256, every parameter, the seed
    report.html       self-contained report (figures embedded)
    figures/          every figure as PNG and SVG
    tables/           CSV tables (fractions, selections, scalogram, LCBD, ...)
    maps.gpkg         one layer per scale class (sites), predicted grids, LCBD
    inputs/           copies of the survey files that were analysed (a Shapefile with its
                      companion files), so that the folder can be moved and re-read

The folder is written inside :func:`~spatial_ev.report.folder.atomic_folder`: whole or absent.
"""

from __future__ import annotations

import json
import os
import platform
import shutil
import sys
from collections.abc import Callable, Mapping
from importlib import metadata
from pathlib import Path
from typing import Any

import pandas as pd

from spatial_ev import __version__
from spatial_ev.input.io import file_sha256
from spatial_ev.pipeline.analysis import Analysis
from spatial_ev.report.context import analysis_context, map_layers
from spatial_ev.report.folder import atomic_folder
from spatial_ev.report.html import write_report
from spatial_ev.report.layers import write_layers, write_table
from spatial_ev.report.summary import summary_record

__all__ = ["write_run_folder", "manifest", "copy_inputs", "library_versions"]

# files a GIS layer needs beside its main file (Shapefile parts), copied with it
_COMPANIONS = {".shp": (".shx", ".dbf", ".prj", ".cpg", ".qix", ".sbn", ".sbx", ".shp.xml")}

_LIBRARIES = ("numpy", "scipy", "pandas", "geopandas", "shapely", "pyproj", "pyogrio",
              "matplotlib", "jinja2", "rich", "threadpoolctl")


def library_versions() -> dict[str, str | None]:
    """Installed versions of the libraries a run depends on (None where one is missing).

    Examples
    --------
    >>> "numpy" in library_versions()
    True
    """
    versions: dict[str, str | None] = {}
    for lib in _LIBRARIES:
        try:
            versions[lib] = metadata.version(lib)
        except metadata.PackageNotFoundError:  # pragma: no cover - optional
            versions[lib] = None
    return versions


def _blas() -> list[dict[str, Any]]:
    from threadpoolctl import threadpool_info

    return [{"api": i.get("internal_api"), "kernel": i.get("architecture"),
             "threads": i.get("num_threads"), "version": i.get("version")}
            for i in threadpool_info()]


def _input_files(analysis: Analysis,
                 inputs: Mapping[str, str | os.PathLike] | None) -> dict[str, Path]:
    """Role -> existing input file (``inputs``, or the survey's sources that are files)."""
    sources = dict(inputs) if inputs is not None else dict(analysis.survey.sources)
    return {role: Path(path) for role, path in sources.items()
            if path is not None and Path(path).is_file()}


def copy_inputs(files: Mapping[str, str | os.PathLike],
                folder: str | os.PathLike) -> dict[str, str]:
    """Copy input files into ``folder/inputs/``; return role -> path of the copy relative to
    ``folder`` (POSIX form, as recorded in the manifest).

    A Shapefile's companion files (``.shx``, ``.dbf``, ``.prj`` …) are copied beside it. Two
    inputs with the same file name are kept apart by prefixing the later one with its role.

    Examples
    --------
    >>> import tempfile
    >>> src = Path(tempfile.mkdtemp()); _ = (src / "sites.csv").write_text("site,x,y")
    >>> copy_inputs({"sites": src / "sites.csv"}, tempfile.mkdtemp())
    {'sites': 'inputs/sites.csv'}
    """
    folder = Path(folder)
    target = folder / "inputs"
    target.mkdir(exist_ok=True)
    copies: dict[str, str] = {}
    for role, path in files.items():
        path = Path(path)
        name = path.name
        if (target / name).exists():
            name = f"{role}_{name}"
        shutil.copy2(path, target / name)
        stem = name[:-len(path.suffix)] if path.suffix else name
        for extra in _COMPANIONS.get(path.suffix.lower(), ()):
            companion = path.with_name(path.name[:-len(path.suffix)] + extra)
            if companion.is_file():
                shutil.copy2(companion, target / (stem + extra))
        copies[role] = f"inputs/{name}"
    return copies


def manifest(analysis: Analysis, *, inputs: Mapping[str, str | os.PathLike] | None = None,
             parameters: Mapping[str, Any] | None = None,
             copies: Mapping[str, str] | None = None) -> dict[str, Any]:
    """Provenance of a run: versions, inputs' SHA-256, parameters and seed.

    ``copies`` (role -> path inside the run folder, from :func:`copy_inputs`) is recorded
    beside each input's original path.

    Examples
    --------
    >>> manifest(result)["package"]["version"]  # doctest: +SKIP
    '0.1.0'
    """
    versions = library_versions()
    files = {}
    for role, path in _input_files(analysis, inputs).items():
        files[role] = {"path": str(path.resolve()), "sha256": file_sha256(path),
                       "bytes": path.stat().st_size}
        if copies is not None and role in copies:
            files[role]["copy"] = copies[role]
    return {
        "package": {"name": "spatial_ev", "version": __version__},
        "python": sys.version.split()[0], "platform": platform.platform(),
        "libraries": versions, "blas": _blas(),
        "openblas_coretype": os.environ.get("OPENBLAS_CORETYPE"),
        "inputs": files,
        "parameters": {**analysis.settings.to_dict(),
                       **(dict(parameters) if parameters else {})},
        "seed": analysis.settings.seed,
    }


def _tables(analysis: Analysis) -> dict[str, pd.DataFrame]:
    a = analysis
    out: dict[str, pd.DataFrame] = {}
    if a.fractions is not None:
        tests = a.fraction_tests or {}
        out["fractions"] = pd.DataFrame(
            {"fraction": ["[a]", "[b]", "[c]", "[d]"],
             "r2_adj": [a.fractions[k] for k in ("environment_only", "shared", "space_only",
                                                 "unexplained")],
             "testable": [True, False, True, False],
             "p": [tests.get("environment_only"), None, tests.get("space_only"), None]},
            index=pd.Index(["environment_only", "shared", "space_only", "unexplained"],
                           name="key"))
    if a.environment_selection is not None:
        out["environment_selection_steps"] = a.environment_selection.steps
    if a.space_selection is not None:
        out["space_selection_steps"] = a.space_selection.steps
    out["selected_space"] = a.space_table().set_index("vector")
    out["weighting_schemes"] = a.weighting.table
    out["spatial_basis"] = a.basis.to_frame()
    out["scalogram"] = a.scalogram
    out["scale_classes"] = pd.DataFrame(
        [{"class": f.scale_class.name, "lower": f.scale_class.bounds[0],
          "upper": f.scale_class.bounds[1], "n_vectors": len(f.scale_class.vectors),
          "vectors": " ".join(f.scale_class.vectors), "r2_adj": f.r2_adj, "p": f.p_value}
         for f in a.scale_fits]).set_index("class")
    out["lcbd"] = a.beta.to_frame()
    if a.selected_space:
        out["selected_vectors_at_sites"] = a.basis.vectors[list(a.selected_space)]
    return out


def write_run_folder(analysis: Analysis, out: str | os.PathLike, *, overwrite: bool = False,
                     inputs: Mapping[str, str | os.PathLike] | None = None,
                     parameters: Mapping[str, Any] | None = None,
                     title: str | None = None,
                     before_commit: Callable[[Path], None] | None = None) -> Path:
    """Write the run folder of an analysis, atomically.

    Parameters
    ----------
    analysis : Analysis
        From :func:`spatial_ev.analyse`.
    out : path
        The folder to create; an existing one is replaced only with ``overwrite=True``.
    inputs : mapping, optional
        Role → input file, hashed into the manifest (default: the survey's sources).
    parameters : mapping, optional
        Extra parameters to record (e.g. the command line).
    title : str, optional
        Report title.
    before_commit : callable, optional
        Called with the temporary folder before it is renamed into place (e.g. to add files
        to it).

    Notes
    -----
    The input files (``inputs``, or the survey's source files) are copied into ``inputs/``
    and the manifest records, for each, its original path, its SHA-256 and its copy; a
    re-read of the folder (:func:`spatial_ev.pipeline.rerun.load_pilot`) falls back to the
    copy, so the folder can be moved.

    Returns
    -------
    pathlib.Path
        ``out``.

    Examples
    --------
    >>> write_run_folder(result, "run-1")  # doctest: +SKIP
    PosixPath('run-1')
    """
    out = Path(out)
    summary = summary_record(analysis)
    context = analysis_context(analysis, title=title)
    with atomic_folder(out, overwrite=overwrite) as tmp:
        (tmp / "summary.json").write_text(json.dumps(summary, indent=2, allow_nan=False) + "\n",
                                          encoding="utf-8")
        tables = tmp / "tables"
        tables.mkdir()
        for name, table in _tables(analysis).items():
            write_table(tables / f"{name}.csv", table)
        write_layers(tmp / "maps.gpkg", map_layers(analysis))
        write_report(context, tmp)
        if before_commit is not None:
            before_commit(tmp)
        copies = copy_inputs(_input_files(analysis, inputs), tmp)
        record = manifest(analysis, inputs=inputs, parameters=parameters, copies=copies)
        (tmp / "manifest.json").write_text(json.dumps(record, indent=2, default=str) + "\n",
                                           encoding="utf-8")
    return out
