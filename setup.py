"""Build step that pyproject.toml cannot say: ship the top-level configs/ inside the package.

``configs/`` stays at the top of the repository, where users and tests read
it; a wheel carries a copy as ``plantation/configs`` so that an installed
``plantation`` command finds its configs (plantation.cli.compose looks there
first, then beside the package in a checkout).
"""

import shutil
from pathlib import Path

from setuptools import setup
from setuptools.command.build_py import build_py


class BuildWithConfigs(build_py):
    def run(self) -> None:
        super().run()
        src = Path(__file__).parent / "configs"
        if src.is_dir() and not self.editable_mode:
            dest = Path(self.build_lib) / "plantation" / "configs"
            shutil.rmtree(dest, ignore_errors=True)
            shutil.copytree(src, dest, ignore=shutil.ignore_patterns("*.pyc", "__pycache__"))


setup(cmdclass={"build_py": BuildWithConfigs})
