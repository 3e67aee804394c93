"""Serve plotly.js from the installed plotly package.

plotly.py writes figure JSON (base64 typed arrays since v6) that only the
plotly.js it bundles decodes, so the page must load that very file, and the
lab may be offline: no CDN.
"""

from __future__ import annotations

from pathlib import Path

from django.contrib.staticfiles.finders import BaseFinder
from django.core.files.storage import FileSystemStorage

PLOTLY_STATIC_PATH = "vendor/plotly.min.js"


def _bundle_dir() -> Path:
    import plotly

    return Path(plotly.__file__).resolve().parent / "package_data"


class PlotlyFinder(BaseFinder):
    def check(self, **kwargs):
        return []

    def find(self, path, find_all=False, **kwargs):
        if path != PLOTLY_STATIC_PATH:
            return [] if find_all else None
        found = str(_bundle_dir() / "plotly.min.js")
        return [found] if find_all else found

    def list(self, ignore_patterns):
        storage = FileSystemStorage(location=str(_bundle_dir()))
        # Collected under vendor/ so the URL does not depend on the package layout.
        storage.prefix = "vendor"
        yield "plotly.min.js", storage
