"""Versions of quakefolio, its main dependencies and Python, as a run's manifest records them."""
from __future__ import annotations

import platform
from importlib import metadata

__all__ = ["package_versions"]

_PACKAGES = ("quakefolio", "numpy", "scipy", "pandas", "pyarrow", "prefect")


def package_versions():
    """Versions of quakefolio, its main dependencies and Python (for the manifest).

    Read from the installed distributions' metadata: nothing is imported.

    Returns
    -------
    dict name -> version string or None
    """
    out = {}
    for name in _PACKAGES:
        try:
            out[name] = metadata.version(name)
        except metadata.PackageNotFoundError:
            out[name] = None
    out["python"] = platform.python_version()
    return out
