"""Build shim: the project's metadata is in setup.cfg and pyproject.toml.

It lets Beam's ``--setup_file ./setup.py`` build the package for remote workers when the
``build`` frontend is not installed (Beam then falls back to ``python setup.py sdist``).
"""

from setuptools import setup

setup()
