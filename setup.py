"""Packaging beyond pyproject.toml: the demo study ships inside the wheel.

The fictional demo study lives in ``sample_grids/`` of the checkout (with the script that
regenerates it). A wheel carries it as ``envelope/demo_data/`` so that ``pip install .``
followed by ``envelope demo`` works anywhere; ``envelope.study.demo.demo_dir`` finds it
there when there is no checkout.
"""

from setuptools import find_packages, setup

DEMO_PACKAGE = "envelope.demo_data"

setup(
    packages=find_packages(include=["envelope", "envelope.*"]) + [DEMO_PACKAGE],
    package_dir={DEMO_PACKAGE: "sample_grids"},
    package_data={DEMO_PACKAGE: ["study.toml", "demo/*.*", "demo/monthly/*", "demo/scenarios/*"]},
)
