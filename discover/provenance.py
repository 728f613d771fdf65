"""The provenance record of a run: config, data files with hashes, package versions, seed."""

from __future__ import annotations

import platform
from importlib import metadata
from pathlib import Path

#: Packages whose code can change a result or a file; their versions go into provenance.json.
PROVENANCE_PACKAGES = ("discover", "numpy", "scipy", "pandas", "pyarrow", "scikit-learn", "matplotlib",
                       "derivative", "pysindy", "joblib", "threadpoolctl", "dask", "distributed", "filterpy")


def provenance(result):
    """Config, data files with their SHA-256 (taken when they were read), versions, seed."""
    packages = {}
    for name in PROVENANCE_PACKAGES:
        try:
            packages[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            packages[name] = None
    held = {id(r) for r in result.held_out.runs}
    runs = list(result.training.runs) + list(result.held_out.runs)
    return {
        "config_source": result.settings.source,
        "config_base": result.settings.base,
        "seed": result.settings.seed,
        "data_files": [
            {"run": r.name, "path": str(Path(r.source).resolve()), "sha256": r.sha256,
             "role": "held_out" if id(r) in held else "training", "samples": r.n_samples}
            for r in runs
        ],
        "packages": packages,
        "python": platform.python_version(),
        "blas_threads": 1,
        "stage_seconds": dict(result.timings),
    }
