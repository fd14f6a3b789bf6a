"""Build hook: ship the demo configuration and its calibration inside the meshwarden package.

The demo files live in config/ at the top of the source tree (where the demo, the tests and the
scenario generator read them); a built wheel has no source tree, so they are copied into
``meshwarden/demo_config/`` so that `pip install .` then `meshwarden serve` runs the demo.
Everything else is declared in pyproject.toml.
"""

from __future__ import annotations

import shutil
from pathlib import Path

from setuptools import setup
from setuptools.command.build_py import build_py

HERE = Path(__file__).resolve().parent


class build_py_with_demo(build_py):
    def run(self) -> None:
        super().run()
        target = Path(self.build_lib) / "meshwarden" / "demo_config"
        if target.exists():
            shutil.rmtree(target)
        target.mkdir(parents=True)
        shutil.copy2(HERE / "config" / "demo.yaml", target / "demo.yaml")
        shutil.copytree(HERE / "config" / "demo", target / "demo")


setup(cmdclass={"build_py": build_py_with_demo})
