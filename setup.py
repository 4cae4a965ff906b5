"""Build hook: the workflow files travel inside the package.

A non-editable install (``pip install .``, a wheel) has no repository beside it,
so the build copies the ``Snakefile`` and ``workflow/{rules,scripts,schemas}`` into
``panelpipe/_workflow/`` with the same layout; `panelpipe.config.WORKFLOW_ROOT`
finds them there. An editable install runs the repository's own files instead.
The metadata lives in pyproject.toml.
"""

from __future__ import annotations

import shutil
from pathlib import Path

from setuptools import setup
from setuptools.command.build_py import build_py

ROOT = Path(__file__).resolve().parent
WORKFLOW_FILES = ("Snakefile", "workflow/rules", "workflow/scripts", "workflow/schemas")


class BuildWithWorkflow(build_py):
    """``build_py`` that also copies the workflow files into the built package."""

    def run(self) -> None:
        super().run()
        if self.editable_mode:
            return
        target = Path(self.build_lib) / "panelpipe" / "_workflow"
        for name in WORKFLOW_FILES:
            source, copy = ROOT / name, target / name
            if source.is_dir():
                ignore = shutil.ignore_patterns("__pycache__", "*.pyc")
                shutil.copytree(source, copy, ignore=ignore, dirs_exist_ok=True)
            else:
                copy.parent.mkdir(parents=True, exist_ok=True)
                shutil.copy2(source, copy)


setup(cmdclass={"build_py": BuildWithWorkflow})
