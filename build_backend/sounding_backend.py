"""setuptools' build backend, without one notice that does not apply to sounding's layout.

sounding's parts keep their own folders (``indexer/`` is ``sounding.indexer``), so an
editable install maps them with a meta path finder, and setuptools then warns that a
folder named like the package in the working directory takes precedence. Here that
folder, ``sounding/``, is the package itself, so the notice only adds noise to every
install; everything else setuptools says is kept.
"""

from __future__ import annotations

import warnings
from typing import Any

from setuptools import build_meta as _setuptools
from setuptools.build_meta import *  # noqa: F403  (every other hook, unchanged)
from setuptools.warnings import InformationOnly


def build_editable(
    wheel_directory: str,
    config_settings: dict[str, Any] | None = None,
    metadata_directory: str | None = None,
) -> str:
    """setuptools' ``build_editable``, minus the working-directory notice."""
    with warnings.catch_warnings():
        warnings.filterwarnings("ignore", "Editable installation", InformationOnly)
        return _setuptools.build_editable(wheel_directory, config_settings, metadata_directory)
