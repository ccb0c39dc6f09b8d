"""The package's version, in the lowest layer so that any module may read it without
importing the package's public face (bayespanel/__init__.py). Keep in step with
pyproject.toml's ``version``."""

__version__ = "0.1.0"
