"""Package layout that pyproject.toml cannot say alone: the top-level runtime_c/ folder (the
C kernels) ships inside the package as tinygen.runtime_c, so an installed tinygen finds it
through importlib.resources; everything else is in pyproject.toml."""
from setuptools import find_namespace_packages, setup

setup(
    packages=find_namespace_packages(include=["tinygen", "tinygen.*"])
    + ["tinygen.runtime_c", "tinygen.runtime_c.include", "tinygen.runtime_c.src"],
    package_dir={"tinygen.runtime_c": "runtime_c"},
)
