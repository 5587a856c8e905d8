"""Gives the Python package the crate's version: Cargo.toml's [package] version is the one
place it is written (python/tests/test_version.py checks every place it shows). The rest
of the build is declared in pyproject.toml."""

import re
from pathlib import Path

from setuptools import setup


def crate_version() -> str:
    text = (Path(__file__).resolve().parent / "Cargo.toml").read_text(encoding="utf-8")
    try:
        import tomllib
    except ModuleNotFoundError:  # Python < 3.11: the [package] table's version line
        table = re.search(r"^\[package\][ \t]*\n(.*?)(?=^\[|\Z)", text, re.M | re.S)
        found = re.search(r'^version\s*=\s*"([^"]+)"', table.group(1) if table else "", re.M)
        if not found:
            raise RuntimeError("no version in the [package] table of Cargo.toml")
        return found.group(1)
    return tomllib.loads(text)["package"]["version"]


setup(version=crate_version())
